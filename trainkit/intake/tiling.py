"""Photos into a workspace: hash, decode, scale, cut on the tile grid, measure quality, save crops.

The grid and its border rule are :mod:`trainkit.core.grid`'s; the scale precedence is
:mod:`trainkit.intake.scale`'s; quality flags come from :mod:`trainkit.intake.quality`.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit.core.cores import usable_cores
from trainkit.core.errors import TrainkitError
from trainkit.core.grid import PatchBox, crop, iter_patch_boxes, overlap_to_stride
from trainkit.intake.quality import quality_measures
from trainkit.intake.scale import ScaleOptions, resolve_scale
from trainkit.intake.sidecar import _check_date, parse_roi, roi_fraction
from trainkit.store.workspace import Workspace

__all__ = ["TilingError"]


class TilingError(TrainkitError):
    """Tiling options that cannot be used; the message names the option and the valid choices."""


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
            raise TilingError("tiling by physical size (tile_mm) needs the photo's scale (gsd_mm)")
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


#: Lossless formats for the stored crops (measured in benchmarks/run.py tiling).
CROP_FORMATS = ("tiff", "png")


@dataclass(frozen=True)
class IntakeJob:
    """Everything a worker needs to tile one photo (plain data, picklable)."""

    path: str
    name: str
    root: str
    tile_px: int
    overlap: float
    tile_mm: float | None
    rec: dict
    scale: ScaleOptions
    group: str
    date: str | None
    known_hash: str | None  # hash of a photo already stored under this name
    known_hashes: frozenset
    max_pixels: int
    skip_flagged: bool
    crop_format: str = "tiff"


def _process(job: IntakeJob) -> dict:
    """Worker: hash, decode, scale, tile, measure, save crops. Returns plain data, no pixels."""
    import hashlib
    import time

    import cv2
    from PIL import Image

    from trainkit.core.decode import PhotoError, read_rgb
    from trainkit.intake.scale import read_exif

    cv2.setNumThreads(1)
    path = Path(job.path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        return {
            "name": job.name,
            "status": "error",
            "error": f"photo {job.name} cannot be read ({exc})",
        }
    digest = hashlib.sha256(data).hexdigest()
    if job.known_hash is not None:
        if job.known_hash == digest:
            return {"name": job.name, "status": "present"}
        return {
            "name": job.name,
            "status": "changed",
            "sha256": digest,
            "error": f"photo {job.name} changed since it was tiled (content hash differs); "
            "skipped: give the new version another name to add it",
        }
    if digest in job.known_hashes:
        return {"name": job.name, "status": "moved", "sha256": digest}
    t0 = time.perf_counter()
    notes: list[str] = []
    try:
        image = read_rgb(path, max_pixels=job.max_pixels, data=data, notes=notes)
    except PhotoError as exc:
        return {"name": job.name, "status": "error", "error": f"{exc}; skipped"}
    t_decode = time.perf_counter() - t0
    exif = read_exif(path, data=data)
    h, w = image.shape[:2]
    gsd, gsd_source = resolve_scale(job.rec, w, job.scale, exif)
    try:
        tiles = tile_photo(
            image, tile_px=job.tile_px, overlap=job.overlap, tile_mm=job.tile_mm, gsd_mm=gsd
        )
    except ValueError as exc:
        return {"name": job.name, "status": "error", "error": f"photo {job.name}: {exc}; skipped"}
    roi = parse_roi(job.rec["roi"], f"photo {job.name}") if "roi" in job.rec else None
    rel_dir = f"patches/{digest[:16]}"
    crop_dir = Path(job.root) / rel_dir
    crop_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for pb, patch in tiles:
        q = quality_measures(patch)
        if roi is not None and roi_fraction(roi, pb.box, h, w) < 0.5:
            q["flags"] = ",".join(f for f in (q["flags"], "outside_roi") if f)
        rel = f"{rel_dir}/r{pb.row:03d}_c{pb.col:03d}.{job.crop_format}"
        if job.crop_format == "png":
            Image.fromarray(patch).save(Path(job.root) / rel, compress_level=1)
        else:  # uncompressed TIFF: lossless and about 10x faster to write than PNG
            Image.fromarray(patch).save(Path(job.root) / rel, format="TIFF")
        rows.append(
            {
                "row": pb.row,
                "col": pb.col,
                "x0": pb.x0,
                "y0": pb.y0,
                "x1": pb.x1,
                "y1": pb.y1,
                "crop": rel,
                "patch_mm": None if gsd is None else (pb.x1 - pb.x0) * gsd,
                "review_skip": int(job.skip_flagged and bool(q["flags"])),
                **q,
            }
        )
    return {
        "name": job.name,
        "status": "tiled",
        "sha256": digest,
        "size_bytes": len(data),
        "width": w,
        "height": h,
        "gsd_mm": gsd,
        "gsd_source": gsd_source,
        "date": job.date or exif.capture_date,
        "roi": job.rec.get("roi"),
        "patches": rows,
        "notes": notes,
        "seconds_decode": t_decode,
        "seconds_total": time.perf_counter() - t0,
    }


def _name_and_group(
    path: Path, root: Path | None, pattern, sidecar: dict
) -> tuple[str, dict, str, str | None]:
    name = path.relative_to(root).as_posix() if root is not None else path.name
    rec = sidecar.get(name) or sidecar.get(path.name) or {}
    group, date = rec.get("group"), rec.get("date")
    if pattern is not None:
        m = pattern.search(name)
        if m:
            gd = m.groupdict()
            group = group or gd.get("group")
            if gd.get("date") and not date:
                date = _check_date(gd["date"], f"photo {name} (--group-pattern)")
    return name, rec, group or Path(name).with_suffix("").as_posix(), date


def tile_into_workspace(
    photos: list[Path],
    workspace: Workspace,
    *,
    overlap: float = 0.0,
    tile_mm: float | None = None,
    sidecar: dict[str, dict] | None = None,
    scale: ScaleOptions | None = None,
    group_by: str = "sidecar",
    group_pattern: str | None = None,
    skip_flagged: bool = False,
    crop_format: str = "tiff",
    workers: int | None = None,
    parallel: str = "threads",
    max_pixels: int | None = None,
    roots: dict[Path, Path] | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> dict:
    """Tile photos into a workspace: hash, decode, scale, cut, measure quality, save crops.

    Photos are named by their path relative to the folder they were found in (``roots``
    maps each file to that folder; a file given directly is named by its file name).
    Re-running is idempotent: a photo already present (same name, same SHA-256) is
    skipped, a moved photo (known hash, new name) only has its location updated, and a
    changed photo (same name, new hash) is reported and skipped. Unreadable photos are
    reported and skipped; each photo and its patches are stored in one transaction, so an
    interrupted run leaves the database consistent and a re-run continues.

    Args:
        group_by: "sidecar" takes the split group from the sidecar's structure/group/site
            column or ``group_pattern`` (else the photo); "photo" uses each photo.
        group_pattern: a regular expression searched in the photo's relative name, with
            optional named groups ``group`` and ``date`` (YYYY-MM-DD).
        skip_flagged: leave patches with any quality flag out of the review queue.
        crop_format: "tiff" (uncompressed, fastest; about 150 KB per 224-px crop) or
            "png" (about 2.5x smaller, several times slower to write; see benchmarks).
        workers: photos decoded and cropped in parallel (default: the usable cores).
        parallel: "threads" (default) or "processes" (measured in benchmarks/run.py tiling).

    Returns:
        Counts (added, present, moved, skipped, patches, flagged, left out of review),
        the problems as one line each, notes on photos added (e.g. only page 1 of a
        multi-page file is used) one line each, and timing (photos per second, decode share).
    """
    import time

    from trainkit.core.decode import DEFAULT_MAX_PIXELS

    pattern = _check_options(group_by, parallel, crop_format, group_pattern)
    template = IntakeJob(
        path="",
        name="",
        root=str(workspace.root),
        tile_px=workspace.tile_px,
        overlap=overlap,
        tile_mm=tile_mm,
        rec={},
        scale=scale or ScaleOptions(),
        group="",
        date=None,
        known_hash=None,
        known_hashes=frozenset(),
        max_pixels=max_pixels or DEFAULT_MAX_PIXELS,
        skip_flagged=skip_flagged,
        crop_format=crop_format,
    )
    jobs, problems, skipped = _plan_jobs(
        photos, workspace, template, sidecar or {}, roots or {}, pattern, group_by
    )
    tally = _Tally(workspace, jobs, problems, skipped)
    n_workers = workers or usable_cores()
    t0 = time.perf_counter()
    for i, res in enumerate(_run_jobs(jobs, n_workers, parallel), start=1):
        tally.record(res)
        if progress:
            progress(i, len(jobs), res["name"])
    wall = time.perf_counter() - t0
    added = tally.counts["photos_added"]
    return {
        **tally.counts,
        "problems": problems,
        "notes": tally.notes,
        "seconds": round(wall, 3),
        "photos_per_second": round(added / wall, 3) if wall > 0 and added else 0.0,
        "decode_share": round(tally.decode_s / tally.total_s, 3) if tally.total_s > 0 else None,
        "workers": n_workers,
    }


def _check_options(group_by: str, parallel: str, crop_format: str, group_pattern: str | None):
    """Validate the choices of :func:`tile_into_workspace`; returns the compiled group pattern."""
    import re

    if group_by not in ("sidecar", "photo"):
        raise TilingError(f"invalid group_by {group_by!r}; choose one of: sidecar, photo")
    if parallel not in ("threads", "processes"):
        raise TilingError(f"invalid parallel mode {parallel!r}; choose one of: threads, processes")
    if crop_format not in CROP_FORMATS:
        raise TilingError(
            f"invalid crop format {crop_format!r}; choose one of: {', '.join(CROP_FORMATS)}"
        )
    try:
        return re.compile(group_pattern) if group_pattern else None
    except re.error as exc:
        raise TilingError(
            f"--group-pattern {group_pattern!r} is not a valid regular expression ({exc})"
        ) from None


def _plan_jobs(
    photos: list[Path],
    workspace: Workspace,
    template: IntakeJob,
    sidecar: dict[str, dict],
    roots: dict[Path, Path],
    pattern,
    group_by: str,
) -> tuple[list[IntakeJob], list[str], int]:
    """One :class:`IntakeJob` per distinct, UTF-8-named photo; problems as one line each, and
    the number of photos skipped for their names."""
    import os
    from dataclasses import replace

    known = workspace.photo_hashes()
    known_hashes = frozenset(known.values())
    jobs: list[IntakeJob] = []
    seen_names: set[str] = set()
    problems: list[str] = []
    skipped = 0
    for path in photos:
        path = Path(path)
        name, rec, group, date = _name_and_group(path, roots.get(path), pattern, sidecar)
        try:  # names are stored as UTF-8 text; a name that is not cannot be kept
            f"{name}{path.resolve()}".encode()
        except UnicodeEncodeError:
            shown = os.fsencode(name).decode("utf-8", "backslashreplace")
            problems.append(
                f"photo {shown} has a file name that is not valid UTF-8; skipped (rename it)"
            )
            skipped += 1
            continue
        if name in seen_names:
            problems.append(f"photo {name} given twice; tiled once")
            continue
        seen_names.add(name)
        if group_by == "photo":
            group = Path(name).with_suffix("").as_posix()
        jobs.append(
            replace(
                template,
                path=str(path.resolve()),
                name=name,
                rec=rec,
                group=group,
                date=date,
                known_hash=known.get(name),
                known_hashes=known_hashes,
            )
        )
    return jobs, problems, skipped


def _run_jobs(jobs: list[IntakeJob], n_workers: int, parallel: str) -> Iterator[dict]:
    """Results of :func:`_process` for each job, in job order."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

    if n_workers <= 1 or len(jobs) <= 1:
        yield from map(_process, jobs)
    elif parallel == "threads":
        # Decoding (Pillow), hashing, quality measures (OpenCV) and file writes release the
        # GIL, so threads share the cores without process start-up or pickling.
        with ThreadPoolExecutor(min(n_workers, len(jobs))) as pool:
            yield from pool.map(_process, jobs)
    else:
        # forkserver, not fork: forking a process that already runs OpenMP/BLAS threads
        # (torch, OpenCV) can deadlock the child.
        ctx = multiprocessing.get_context("forkserver")
        with ProcessPoolExecutor(min(n_workers, len(jobs)), mp_context=ctx) as pool:
            yield from pool.map(_process, jobs)


class _Tally:
    """Stores each photo's result in the workspace and keeps the run's counts."""

    def __init__(
        self, workspace: Workspace, jobs: list[IntakeJob], problems: list[str], skipped: int
    ) -> None:
        self.workspace = workspace
        self.by_name = {j.name: j for j in jobs}
        self.hash_to_name = {v: k for k, v in workspace.photo_hashes().items()}
        self.problems = problems
        self.notes: list[str] = []
        self.decode_s = self.total_s = 0.0
        self.counts = {
            "photos_added": 0,
            "photos_already_present": 0,
            "photos_moved": 0,
            "photos_skipped": skipped,
            "patches_added": 0,
            "patches_flagged": 0,
            "patches_left_out_of_review": 0,
        }

    def record(self, res: dict) -> None:
        counts, st = self.counts, res["status"]
        if st == "present":
            counts["photos_already_present"] += 1
        elif st == "moved":
            job = self.by_name[res["name"]]
            self.workspace.set_source_path(self.hash_to_name[res["sha256"]], job.path)
            counts["photos_moved"] += 1
        elif st in ("error", "changed"):
            self.problems.append(res["error"])
            counts["photos_skipped"] += 1
        else:
            job = self.by_name[res["name"]]
            self.workspace.add_photo_with_patches(
                name=res["name"],
                source_path=job.path,
                size_bytes=res["size_bytes"],
                width=res["width"],
                height=res["height"],
                gsd_mm=res["gsd_mm"],
                gsd_source=res["gsd_source"],
                group_id=job.group,
                capture_date=res["date"],
                roi=res["roi"],
                sha256=res["sha256"],
                patches=res["patches"],
            )
            self.notes.extend(res.get("notes", []))
            counts["photos_added"] += 1
            counts["patches_added"] += len(res["patches"])
            counts["patches_flagged"] += sum(bool(p["flags"]) for p in res["patches"])
            counts["patches_left_out_of_review"] += sum(p["review_skip"] for p in res["patches"])
            self.decode_s += res["seconds_decode"]
            self.total_s += res["seconds_total"]
