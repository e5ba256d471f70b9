"""Write a labelled synthetic dataset: photos, truth files, scale and label tables, manifest."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
from PIL import Image

from trainkit.core.fsutil import atomic_path, atomic_write_text
from trainkit.core.grid import grid_boxes
from trainkit.core.taxonomy import ClassSet
from trainkit.synth.labels import LabelRules, derive_patch_label
from trainkit.synth.options import GENERATOR_VERSION, SCENE_MIX, SynthError, SynthOptions
from trainkit.synth.photo import generate_photo
from trainkit.synth.truth import SynthPhoto

__all__ = ["ASSET_OWNER", "STRUCTURES", "PhotoSpec", "scene_plan", "photo_specs", "write_dataset"]

#: Fictional asset owner and structures used to name photos in :func:`write_dataset`.
#: Coined words (not places, organisations or brands) joined to trade terms for the kind.
ASSET_OWNER = "Quembrath (fictional)"
STRUCTURES = ("brevask-deck", "ullomir-culvert", "tessivane-wall", "korrindel-pier")

#: Labelling thresholds used unless the caller passes others (frozen, so safe to share).
_DEFAULT_RULES = LabelRules()
_SCALE_HEADER = ("photo", "structure", "gsd_mm")
_LABEL_HEADER = ("photo", "x0", "y0", "x1", "y1", "label", "status", "reason")


@dataclass(frozen=True)
class PhotoSpec:
    """Everything that decides one photo of a dataset.

    Attributes:
        name: file stem, ``<structure>-<NNN>``.
        structure: the structure the photo belongs to.
        seed: the photo's own seed for :func:`generate_photo`.
        options: the photo's generation options (scene, angle, width and scale filled in).
    """

    name: str
    structure: str
    seed: int
    options: SynthOptions


def _boxes(height: int, width: int, tile_px: int) -> list[tuple[int, int, int, int]]:
    return [tuple(int(v) for v in b) for b in grid_boxes(height, width, tile_px, tile_px)]


def scene_plan(rng: np.random.Generator, n: int) -> list[tuple[str, float | None]]:
    """Deterministic scene list matching SCENE_MIX (largest remainder), shuffled.

    Single-crack scenes get angles stratified over [0, 180): one per equal bin.
    """
    fr = np.array([p for _, p in SCENE_MIX]) * n
    counts = np.floor(fr).astype(int)
    order = sorted(range(len(fr)), key=lambda i: (-(fr[i] - counts[i]), i))
    for i in order[: n - int(counts.sum())]:
        counts[i] += 1
    scenes: list[str] = []
    for (name, _), c in zip(SCENE_MIX, counts, strict=True):
        scenes.extend([name] * int(c))
    n_single = scenes.count("single")
    angles = list(
        rng.permutation(
            (np.arange(n_single) + rng.uniform(0, 1, n_single)) * 180.0 / max(n_single, 1)
        )
    )
    plan: list[tuple[str, float | None]] = []
    for s in (scenes[i] for i in rng.permutation(n)):
        plan.append((s, round(float(angles.pop()), 2) if s == "single" else None))
    return plan


def photo_specs(rng: np.random.Generator, n_photos: int, options: SynthOptions) -> list[PhotoSpec]:
    """Plan every photo of a dataset from the master stream, without drawing any pixels.

    Draws, in order: the scene plan (:func:`scene_plan`), then per photo its structure,
    its gsd in [0.25, 0.6] mm/px (unless ``options.gsd_mm`` is set), its widest
    main-crack width in [0.2, 1] x ``options.max_width_px`` (at least 0.8 px) and its seed.

    Args:
        rng: the dataset's master random stream.
        n_photos: number of photos.
        options: base generation options.

    Returns:
        One spec per photo, named ``<structure>-<NNN>`` counting per structure.
    """
    plan = scene_plan(rng, n_photos)
    per_structure = dict.fromkeys(STRUCTURES, 0)
    specs: list[PhotoSpec] = []
    for scene, angle in plan:
        structure = STRUCTURES[int(rng.integers(len(STRUCTURES)))]
        per_structure[structure] += 1
        gsd = (
            options.gsd_mm
            if options.gsd_mm is not None
            else round(float(rng.uniform(0.25, 0.6)), 4)
        )
        wmax = round(max(0.8, float(rng.uniform(0.2, 1.0)) * options.max_width_px), 3)
        photo_seed = int(rng.integers(0, 2**31 - 1))
        opts = replace(
            options,
            scene=scene,
            crack_angle_deg=angle,
            max_width_px=wmax,
            jpeg_quality=None,
            gsd_mm=gsd,
        )
        name = f"{structure}-{per_structure[structure]:03d}"
        specs.append(PhotoSpec(name=name, structure=structure, seed=photo_seed, options=opts))
    return specs


def _label_rows(
    photo_file: str,
    photo: SynthPhoto,
    boxes: Sequence[tuple[int, int, int, int]],
    class_set: ClassSet,
    rules: LabelRules,
) -> list[tuple]:
    rows = []
    for b in boxes:
        t = derive_patch_label(photo.cracks, b, class_set, rules)
        label = "" if t.label is None else class_set.names[t.label]
        rows.append((photo_file, *b, label, t.status, t.reason))
    return rows


def _csv_text(header: Sequence[str], rows: Sequence[Sequence]) -> str:
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    wr.writerow(header)
    wr.writerows(rows)
    return buf.getvalue()


def _write_photo(out_dir: Path, spec: PhotoSpec, photo: SynthPhoto, jpeg_quality: int) -> None:
    """Write ``photos/<name>.jpg`` and ``truth/<name>.json`` of one photo."""
    with atomic_path(out_dir / "photos" / f"{spec.name}.jpg") as tmp:
        Image.fromarray(photo.image, "RGB").save(tmp, format="JPEG", quality=int(jpeg_quality))
    truth = photo.to_json_dict()
    truth["structure"] = spec.structure
    truth["max_width_px_option"] = spec.options.max_width_px
    atomic_write_text(
        out_dir / "truth" / f"{spec.name}.json",
        json.dumps(truth, sort_keys=True, separators=(",", ":")) + "\n",
    )


def _options_record(options: SynthOptions) -> dict:
    """The options as written to the manifest; ``surface`` only when it is not the default,
    so manifests made before the option existed stay byte-identical."""
    record = asdict(options)
    if options.surface == "default":
        del record["surface"]
    else:
        record["surface"] = options.surface.name
    return record


def _check_arguments(
    n_photos: int, seed: int, tile_px: int, options: SynthOptions, jpeg_quality: int
) -> None:
    if isinstance(n_photos, bool) or not isinstance(n_photos, int) or n_photos < 1:
        raise SynthError(f"write_dataset: expected n_photos >= 1, got {n_photos!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise SynthError(f"write_dataset: expected a non-negative int seed, got {seed!r}")
    if not (1 <= jpeg_quality <= 100):
        raise SynthError(f"write_dataset: expected jpeg_quality 1..100, got {jpeg_quality!r}")
    if not isinstance(tile_px, int) or not (1 <= tile_px <= min(options.height, options.width)):
        raise SynthError(
            f"write_dataset: expected tile_px in 1..{min(options.height, options.width)}, "
            f"got {tile_px!r}"
        )


def write_dataset(
    out_dir: Path,
    *,
    n_photos: int,
    seed: int,
    tile_px: int,
    options: SynthOptions,
    class_set: ClassSet,
    rules: LabelRules = _DEFAULT_RULES,
    jpeg_quality: int = 90,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """Write a labelled synthetic dataset of concrete photos.

    Layout: ``photos/<name>.jpg``, ``truth/<name>.json``, ``scale.csv``
    (photo,structure,gsd_mm; photo is the file name with its suffix), ``labels.csv``
    (photo,x0,y0,x1,y1,label,status,reason) for a tile grid of ``tile_px`` squares, and
    ``manifest.json``, each written atomically. Photos belong to structures of a
    fictional owner (:data:`ASSET_OWNER`) and are planned by :func:`photo_specs`.
    ``options.scene`` and ``options.crack_angle_deg`` are replaced per photo;
    ``options.jpeg_quality`` is ignored (the files are JPEG at ``jpeg_quality``). Output
    is byte-for-byte reproducible for the same arguments.

    Args:
        out_dir: output folder (created).
        n_photos: number of photos (>= 1).
        seed: master seed (>= 0).
        tile_px: tile side in pixels (<= photo height and width).
        options: base generation options.
        class_set: class set used for labels.
        rules: labelling thresholds.
        jpeg_quality: JPEG quality of the written photos (1..100).
        progress: called as ``progress(done, total)`` after each photo.

    Returns:
        The manifest dict (also written to ``manifest.json``).
    """
    _check_arguments(n_photos, seed, tile_px, options, jpeg_quality)
    out_dir = Path(out_dir)
    (out_dir / "photos").mkdir(parents=True, exist_ok=True)
    (out_dir / "truth").mkdir(parents=True, exist_ok=True)
    specs = photo_specs(np.random.default_rng(seed), n_photos, options)
    boxes = _boxes(options.height, options.width, tile_px)

    scale_rows: list[tuple[str, str, str]] = []
    label_rows: list[tuple] = []
    scene_counts = dict.fromkeys((s for s, _ in SCENE_MIX), 0)
    for i, spec in enumerate(specs):
        photo = generate_photo(spec.seed, spec.options)
        scene_counts[photo.scene] += 1
        _write_photo(out_dir, spec, photo, jpeg_quality)
        scale_rows.append((f"{spec.name}.jpg", spec.structure, f"{spec.options.gsd_mm:.4f}"))
        label_rows.extend(_label_rows(f"{spec.name}.jpg", photo, boxes, class_set, rules))
        if progress is not None:
            progress(i + 1, n_photos)

    scale_rows.sort()
    label_rows.sort(key=lambda r: (r[0], r[2], r[1], r[4], r[3]))
    atomic_write_text(out_dir / "scale.csv", _csv_text(_SCALE_HEADER, scale_rows))
    atomic_write_text(out_dir / "labels.csv", _csv_text(_LABEL_HEADER, label_rows))

    counts = dict.fromkeys(class_set.names, 0)
    counts["ambiguous"] = 0
    for r in label_rows:
        counts[r[5] if r[5] else "ambiguous"] += 1
    per_structure = dict.fromkeys(STRUCTURES, 0)
    for spec in specs:
        per_structure[spec.structure] += 1
    manifest = {
        "generator": GENERATOR_VERSION,
        "asset_owner": ASSET_OWNER,
        "seed": seed,
        "n_photos": n_photos,
        "tile_px": tile_px,
        "jpeg_quality": int(jpeg_quality),
        "options": _options_record(options),
        "rules": asdict(rules),
        "class_set": class_set.name,
        "class_names": list(class_set.names),
        "counts": counts,
        "n_tiles": len(label_rows),
        "scenes": scene_counts,
        "structures": {k: v for k, v in per_structure.items() if v},
    }
    atomic_write_text(
        out_dir / "manifest.json", json.dumps(manifest, sort_keys=True, indent=2) + "\n"
    )
    return manifest
