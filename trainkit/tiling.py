"""Cut a photo into square patch boxes that cover every pixel, and crop them.

Border rule: tiles start at 0 and advance by the stride; if the last tile would
run past the border, it is shifted inward so that it ends exactly at the border
(it then overlaps its neighbour). No pixel is dropped and nothing is padded. A
photo smaller than one tile along an axis gives a single tile along that axis
that is padded by edge replication when cropped, and the box records the true
extent.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .workspace import Workspace

__all__ = ["axis_starts", "grid_boxes", "crop", "Box", "PatchBox"]

Box = tuple[int, int, int, int]


@dataclass(frozen=True)
class PatchBox:
    """A tile's place in its photo: grid row/column and pixel box (x1, y1 exclusive)."""

    row: int
    col: int
    x0: int
    y0: int
    x1: int
    y1: int

    @property
    def box(self) -> Box:
        return (self.x0, self.y0, self.x1, self.y1)


def axis_starts(length: int, tile: int, stride: int) -> list[int]:
    """Start offsets along one axis with the last tile shifted inward to end at the border.

    Args:
        length: image extent in pixels along the axis (>= 1).
        tile: tile size in pixels (>= 1).
        stride: step between tile starts in pixels (1 <= stride <= tile).

    Returns:
        Sorted, unique start offsets; every pixel in [0, length) is covered.
    """
    if length < 1 or tile < 1:
        raise ValueError(f"expected positive length and tile, got length={length}, tile={tile}")
    if not 1 <= stride <= tile:
        raise ValueError(f"stride must be between 1 and the tile size {tile}, got {stride}")
    if length <= tile:
        return [0]
    starts = list(range(0, length - tile + 1, stride))
    if starts[-1] + tile < length:
        starts.append(length - tile)
    return starts


def grid_boxes(height: int, width: int, tile_px: int, stride_px: int | None = None) -> list[Box]:
    """Boxes (x0, y0, x1, y1) of a row-major tile grid that covers the whole image."""
    return [p.box for p in iter_patch_boxes(height, width, tile_px, stride_px)]


def iter_patch_boxes(
    height: int, width: int, tile_px: int, stride_px: int | None = None
) -> Iterator[PatchBox]:
    """Row-major :class:`PatchBox` grid covering the whole image (see module docstring)."""
    stride = tile_px if stride_px is None else stride_px
    ys = axis_starts(height, tile_px, stride)
    xs = axis_starts(width, tile_px, stride)
    for r, y0 in enumerate(ys):
        for c, x0 in enumerate(xs):
            yield PatchBox(r, c, x0, y0, min(x0 + tile_px, width), min(y0 + tile_px, height))


def overlap_to_stride(tile_px: int, overlap: float) -> int:
    """Stride in pixels for a fractional overlap in [0, 1)."""
    if not 0.0 <= overlap < 1.0:
        raise ValueError(f"overlap must be in [0, 1), got {overlap}")
    return max(1, int(round(tile_px * (1.0 - overlap))))


def crop(image: np.ndarray, box: Box, tile_px: int) -> np.ndarray:
    """Crop a box; a box smaller than the tile (tiny photo) is edge-padded to tile_px square."""
    x0, y0, x1, y1 = box
    patch = image[y0:y1, x0:x1]
    ph, pw = patch.shape[:2]
    if ph < tile_px or pw < tile_px:
        pad = [(0, tile_px - ph), (0, tile_px - pw)] + [(0, 0)] * (image.ndim - 2)
        patch = np.pad(patch, pad, mode="edge")
    return np.ascontiguousarray(patch)


# ----- quality measures ------------------------------------------------------------

#: Quality thresholds (common practice, tuned on the synthetic set; adjust per camera).
FOCUS_MIN = 20.0  # variance of the Laplacian of the grey patch below this -> "blurred"
CLIPPED_MAX = 0.25  # fraction of grey pixels at <= 2 or >= 253 above this -> "exposure"
TEXTURE_MIN_STD = 2.0  # grey standard deviation below this -> "low_texture"


def quality_measures(patch_rgb: np.ndarray) -> dict:
    """Focus (variance of the Laplacian), clipped fraction and quality flags of a patch."""
    import cv2

    grey = cv2.cvtColor(patch_rgb, cv2.COLOR_RGB2GRAY)
    focus = float(cv2.Laplacian(grey, cv2.CV_64F).var())
    clipped = float(np.mean((grey <= 2) | (grey >= 253)))
    flags = []
    if focus < FOCUS_MIN:
        flags.append("blurred")
    if clipped > CLIPPED_MAX:
        flags.append("exposure")
    if float(grey.std()) < TEXTURE_MIN_STD:
        flags.append("low_texture")
    return {"focus": focus, "clipped": clipped, "flags": ",".join(flags)}


# ----- photos into a workspace -------------------------------------------------------


def tile_photo(
    image: np.ndarray,
    *,
    tile_px: int,
    overlap: float = 0.0,
    tile_mm: float | None = None,
    gsd_mm: float | None = None,
) -> list[tuple[PatchBox, np.ndarray]]:
    """Cut one RGB photo into (box, tile_px x tile_px crop) pairs covering the whole photo.

    With ``tile_mm`` the box side in photo pixels is ``tile_mm / gsd_mm`` and each crop
    is resampled (area interpolation) to ``tile_px``; boxes stay in photo pixels.
    """
    import cv2

    if tile_mm is not None:
        if gsd_mm is None:
            raise ValueError("tiling by physical size (tile_mm) needs the photo's scale (gsd_mm)")
        src_tile = max(1, int(round(tile_mm / gsd_mm)))
    else:
        src_tile = tile_px
    h, w = image.shape[:2]
    stride = overlap_to_stride(src_tile, overlap)
    out = []
    for pb in iter_patch_boxes(h, w, src_tile, stride):
        patch = crop(image, pb.box, src_tile)
        if src_tile != tile_px:
            interp = cv2.INTER_AREA if src_tile > tile_px else cv2.INTER_LINEAR
            patch = cv2.resize(patch, (tile_px, tile_px), interpolation=interp)
        out.append((pb, patch))
    return out


def read_sidecar(path: str | Path) -> dict[str, dict]:
    """Read a sidecar CSV keyed by photo file name.

    Columns: ``photo`` (required), then any of ``gsd_mm``; ``distance_m``,
    ``focal_mm``, ``sensor_width_mm`` (scale by the pinhole relation); ``structure``
    or ``group`` (keeps a structure's photos in one split).
    """
    import csv

    path = Path(path)
    out: dict[str, dict] = {}
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if reader.fieldnames is None or "photo" not in reader.fieldnames:
            raise ValueError(
                f"sidecar {path.name}: expected a header with a 'photo' column, got {reader.fieldnames}"
            )
        for i, row in enumerate(reader, start=2):
            name = (row.get("photo") or "").strip()
            if not name:
                raise ValueError(f"sidecar {path.name} line {i}: empty 'photo'")
            if Path(name).is_absolute() or ".." in Path(name).parts:
                raise ValueError(
                    f"sidecar {path.name} line {i}: photo {name!r} must be a plain file name"
                )
            rec: dict = {}
            for key in ("gsd_mm", "distance_m", "focal_mm", "sensor_width_mm"):
                v = (row.get(key) or "").strip()
                if v:
                    try:
                        rec[key] = float(v)
                    except ValueError:
                        raise ValueError(
                            f"sidecar {path.name} line {i}: {key} {v!r} is not a number"
                        ) from None
                    if not rec[key] > 0:
                        raise ValueError(
                            f"sidecar {path.name} line {i}: {key} must be positive, got {v}"
                        )
            grp = (row.get("structure") or row.get("group") or "").strip()
            if grp:
                rec["group"] = grp
            out[name] = rec
    return out


def resolve_scale(rec: dict, image_width_px: int, default_gsd_mm: float | None) -> float | None:
    """Scale of one photo: sidecar gsd_mm, else sidecar camera geometry, else the default."""
    from .imaging import gsd_mm_per_px

    if "gsd_mm" in rec:
        return float(rec["gsd_mm"])
    if {"distance_m", "focal_mm", "sensor_width_mm"} <= rec.keys():
        return gsd_mm_per_px(
            sensor_width_mm=rec["sensor_width_mm"],
            distance_m=rec["distance_m"],
            focal_mm=rec["focal_mm"],
            image_width_px=image_width_px,
        )
    return default_gsd_mm


def tile_into_workspace(
    photos: list[Path],
    workspace: Workspace,
    *,
    overlap: float = 0.0,
    tile_mm: float | None = None,
    sidecar: dict[str, dict] | None = None,
    default_gsd_mm: float | None = None,
    group_by: str = "sidecar",
    progress: Callable[[int, int, str], None] | None = None,
) -> dict:
    """Tile photos into a workspace: decode, cut, measure quality, save crops, record provenance.

    Photos already in the workspace (same file name) are skipped; unreadable photos are
    reported and skipped. ``group_by="sidecar"`` takes each photo's split group from the
    sidecar's structure column (the photo itself when absent); ``"photo"`` uses the photo.
    Returns counts and the list of problems.
    """
    if group_by not in ("sidecar", "photo"):
        raise ValueError(f"invalid group_by {group_by!r}; choose one of: sidecar, photo")
    import hashlib

    from PIL import Image

    from .imaging import PhotoError, read_rgb

    sidecar = sidecar or {}
    tile_px = workspace.tile_px
    added = skipped_existing = 0
    n_patches = n_flagged = 0
    problems: list[str] = []
    for i, path in enumerate(photos):
        path = Path(path)
        name = path.name
        if progress:
            progress(i, len(photos), name)
        if workspace.photo_id(name) is not None:
            skipped_existing += 1
            continue
        try:
            image = read_rgb(path)
        except PhotoError as exc:
            problems.append(str(exc))
            continue
        rec = sidecar.get(name, {})
        h, w = image.shape[:2]
        gsd = resolve_scale(rec, w, default_gsd_mm)
        try:
            tiles = tile_photo(image, tile_px=tile_px, overlap=overlap, tile_mm=tile_mm, gsd_mm=gsd)
        except ValueError as exc:
            problems.append(f"photo {name}: {exc}; skipped")
            continue
        crop_dir = workspace.root / "patches" / path.stem
        crop_dir.mkdir(parents=True, exist_ok=True)
        rows = []
        for pb, patch in tiles:
            q = quality_measures(patch)
            rel = f"patches/{path.stem}/r{pb.row:03d}_c{pb.col:03d}.png"
            Image.fromarray(patch).save(workspace.root / rel, compress_level=1)
            side_px = pb.x1 - pb.x0
            rows.append(
                {
                    "row": pb.row,
                    "col": pb.col,
                    "x0": pb.x0,
                    "y0": pb.y0,
                    "x1": pb.x1,
                    "y1": pb.y1,
                    "crop": rel,
                    "patch_mm": None if gsd is None else side_px * gsd,
                    **q,
                }
            )
            n_flagged += bool(q["flags"])
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        workspace.add_photo_with_patches(
            name=name,
            source_path=str(path.resolve()),
            width=w,
            height=h,
            gsd_mm=gsd,
            group_id=rec.get("group", path.stem) if group_by == "sidecar" else path.stem,
            sha256=digest,
            patches=rows,
        )
        added += 1
        n_patches += len(rows)
    if progress:
        progress(len(photos), len(photos), "")
    return {
        "photos_added": added,
        "photos_already_present": skipped_existing,
        "photos_skipped": len(problems),
        "patches_added": n_patches,
        "patches_flagged": n_flagged,
        "problems": problems,
    }
