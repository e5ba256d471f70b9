"""Photos into a workspace: hash, decode, scale, lay the tile grid, measure quality; rows only.

Tiling stores no pixels. A patch is a row (photo, box, scale, quality flags, provenance);
its pixels are cut from the photo when someone needs them, by the one cutting rule
(:func:`trainkit.store.pixels.cut_patch`), from the box and the grid's box side in photo
pixels recorded with the photo (``grid_px``).

Photos are hashed, decoded and measured by workers (a process pool on this machine by
default, or threads, or a Dask cluster); this process is the one writer of the workspace
and stores the photos in the order given, one transaction each, so the rows and their ids
do not depend on the engine or the number of workers, and a run stopped at any point
continues from its last stored photo.

The grid and its border rule are :mod:`trainkit.core.grid`'s; the scale precedence is
:mod:`trainkit.intake.scale`'s; quality flags come from :mod:`trainkit.intake.quality`.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit.core.cores import usable_cores
from trainkit.core.errors import TrainkitError
from trainkit.core.grid import PatchBox, iter_patch_boxes, overlap_to_stride
from trainkit.intake.quality import grid_quality
from trainkit.intake.scale import ScaleOptions, resolve_scale
from trainkit.intake.sidecar import _check_date, parse_roi, roi_fraction
from trainkit.store.pixels import cut_patch
from trainkit.store.workspace import Workspace

__all__ = ["TilingError", "ENGINES", "PARALLEL_MODES", "check_engine"]

#: Where the photos are decoded: on this machine, or on a Dask distributed cluster.
ENGINES = ("local", "dask")
#: How the local engine runs its workers.
PARALLEL_MODES = ("processes", "threads")
#: Photos handed to the workers ahead of the one being stored, per worker: bounds the
#: memory of a run (results wait in input order) whatever the archive's size.
AHEAD_PER_WORKER = 3
#: Seconds to wait for a Dask scheduler to answer.
DASK_CONNECT_TIMEOUT_S = 30


class TilingError(TrainkitError):
    """Tiling options that cannot be used; the message names the option and the valid choices."""


# ----- one photo ---------------------------------------------------------------------


def photo_grid(
    height: int,
    width: int,
    *,
    tile_px: int,
    overlap: float = 0.0,
    tile_mm: float | None = None,
    gsd_mm: float | None = None,
) -> tuple[int, list[PatchBox]]:
    """The tile grid of a photo: the boxes' side in photo pixels, and the boxes.

    With ``tile_mm`` the side is ``tile_mm / gsd_mm`` photo pixels (each patch is then
    resampled to ``tile_px`` when cut); otherwise it is ``tile_px``.
    """
    if tile_mm is not None:
        if gsd_mm is None:
            raise TilingError("tiling by physical size (tile_mm) needs the photo's scale (gsd_mm)")
        src_px = max(1, int(round(tile_mm / gsd_mm)))
    else:
        src_px = tile_px
    stride = overlap_to_stride(src_px, overlap)
    return src_px, list(iter_patch_boxes(height, width, src_px, stride))


def tile_photo(
    image: np.ndarray,
    *,
    tile_px: int,
    overlap: float = 0.0,
    tile_mm: float | None = None,
    gsd_mm: float | None = None,
) -> list[tuple[PatchBox, np.ndarray]]:
    """Cut one RGB photo into (box, tile_px x tile_px patch) pairs covering the whole photo.

    The grid is :func:`photo_grid`'s and each patch is cut by
    :func:`trainkit.store.pixels.cut_patch` (boxes stay in photo pixels).
    """
    src_px, boxes = photo_grid(
        *image.shape[:2], tile_px=tile_px, overlap=overlap, tile_mm=tile_mm, gsd_mm=gsd_mm
    )
    return [(pb, cut_patch(image, pb.box, tile_px, src_px)) for pb in boxes]


@dataclass(frozen=True)
class IntakeJob:
    """Everything a worker needs to tile one photo (plain data, picklable)."""

    path: str
    name: str
    tile_px: int
    overlap: float
    tile_mm: float | None
    rec: dict
    scale: ScaleOptions
    group: str
    date: str | None
    known_hash: str | None  # hash of a photo already stored under this name
    max_pixels: int
    skip_flagged: bool


def _process(job: IntakeJob, known_hashes: frozenset | set) -> dict:
    """Worker: hash, decode, scale, lay the grid, measure quality. Returns rows, no pixels.

    Tiling needs only grey levels: a JPEG is decoded by OpenCV to its luminance alone
    (:func:`trainkit.core.decode.read_luma_fast`, about half a colour decode), so the
    quality measures see those levels, which may differ from the grey of Pillow's colour
    pixels by a level or two (the crops shown and learned from are cut from Pillow's);
    the flags are thresholds on those measures. Other formats are decoded to RGB.
    """
    import hashlib
    import time

    from trainkit.core.decode import PhotoError, read_luma_fast
    from trainkit.intake.scale import read_exif

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
    if digest in known_hashes:
        return {"name": job.name, "status": "moved", "sha256": digest}
    t0 = time.perf_counter()
    notes: list[str] = []
    try:
        image = read_luma_fast(path, max_pixels=job.max_pixels, data=data, notes=notes)
    except PhotoError as exc:
        return {"name": job.name, "status": "error", "error": f"{exc}; skipped"}
    t_decode = time.perf_counter() - t0
    exif = read_exif(path, data=data)
    h, w = image.shape[:2]
    gsd, gsd_source = resolve_scale(job.rec, w, job.scale, exif)
    try:
        src_px, boxes = photo_grid(
            h, w, tile_px=job.tile_px, overlap=job.overlap, tile_mm=job.tile_mm, gsd_mm=gsd
        )
    except ValueError as exc:
        return {"name": job.name, "status": "error", "error": f"photo {job.name}: {exc}; skipped"}
    quality = grid_quality(image, [pb.box for pb in boxes], tile_px=job.tile_px, src_px=src_px)
    del image
    roi = parse_roi(job.rec["roi"], f"photo {job.name}") if "roi" in job.rec else None
    rows = []
    for pb, q in zip(boxes, quality, strict=True):
        if roi is not None and roi_fraction(roi, pb.box, h, w) < 0.5:
            q["flags"] = ",".join(f for f in (q["flags"], "outside_roi") if f)
        rows.append(
            {
                "row": pb.row,
                "col": pb.col,
                "x0": pb.x0,
                "y0": pb.y0,
                "x1": pb.x1,
                "y1": pb.y1,
                "crop": "",  # no pixels stored: cut from the photo on demand
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
        "grid_px": src_px,
        "date": job.date or exif.capture_date,
        "roi": job.rec.get("roi"),
        "patches": rows,
        "notes": notes,
        "seconds_decode": t_decode,
        "seconds_total": time.perf_counter() - t0,
    }


def dask_tile_task(job: IntakeJob, known_hashes: frozenset) -> dict:
    """One photo on a Dask worker: :func:`_process`, with OpenCV on one thread."""
    import cv2

    cv2.setNumThreads(1)
    return _process(job, known_hashes)


#: The workspace's known photo hashes in a pool worker process, set once by
#: :func:`_pool_init` (sent once per worker rather than with each of thousands of photos).
_POOL_KNOWN: frozenset = frozenset()


def _pool_init(known_hashes: frozenset) -> None:
    """Set up a pool worker: one OpenCV thread, Ctrl-C left to the main process, and an
    exit as soon as the main process is gone (killed), so no worker outlives it."""
    import multiprocessing
    import os
    import signal
    import threading

    import cv2

    global _POOL_KNOWN
    _POOL_KNOWN = known_hashes
    cv2.setNumThreads(1)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    parent = multiprocessing.parent_process()
    if parent is not None:

        def leave_with_parent() -> None:
            parent.join()
            os._exit(1)

        threading.Thread(target=leave_with_parent, daemon=True).start()


def _pool_task(job: IntakeJob) -> dict:
    return _process(job, _POOL_KNOWN)


# ----- photos into a workspace -------------------------------------------------------


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
    workers: int | None = None,
    parallel: str = "processes",
    engine: str = "local",
    scheduler: str | None = None,
    max_pixels: int | None = None,
    roots: dict[Path, Path] | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    crop_format: str | None = None,
) -> dict:
    """Tile photos into a workspace: hash, decode, scale, lay the grid, measure quality.

    Photos are named by their path relative to the folder they were found in (``roots``
    maps each file to that folder; a file given directly is named by its file name).
    Re-running is idempotent: a photo already present (same name, same SHA-256) is
    skipped (its location updated if it is now found elsewhere), a moved photo (known
    hash, new name) only has its location updated, and a changed photo (same name, new
    hash) is reported and skipped. Unreadable photos are reported and skipped. Each photo
    and its patches are stored in one transaction, in the order of ``photos``, so an
    interrupted run leaves the database consistent and a re-run continues where it
    stopped, ending with the rows an uninterrupted run gives.

    Args:
        group_by: "sidecar" takes the split group from the sidecar's structure/group/site
            column or ``group_pattern`` (else the photo); "photo" uses each photo.
        group_pattern: a regular expression searched in the photo's relative name, with
            optional named groups ``group`` and ``date`` (YYYY-MM-DD).
        skip_flagged: leave patches with any quality flag out of the review queue.
        workers: local workers (default: the usable cores; 1 tiles in this process).
        parallel: "processes" (default) or "threads" for the local workers.
        engine: "local", or "dask" to decode on the Dask cluster at ``scheduler``
            (every worker must see the photos at the same absolute paths; this process
            writes the workspace).
        scheduler: the Dask scheduler's address, e.g. tcp://scheduler-host:8786.
        progress: called with (photos done, photos, name) after each photo is stored.
        crop_format: ignored; crops are no longer written at tiling (deprecated).

    Returns:
        Counts (added, present, moved, skipped, patches, flagged, left out of review),
        the problems as one line each, notes on photos added (e.g. only page 1 of a
        multi-page file is used) one line each, and timing (photos per second, decode share).

    Raises:
        TilingError: an option out of range, or the Dask engine cannot be used (dask is
            not installed, the scheduler cannot be reached).
    """
    import time
    from contextlib import closing

    from trainkit.core.decode import DEFAULT_MAX_PIXELS

    if crop_format is not None:
        import warnings

        warnings.warn(
            "crop_format is ignored: tiling no longer writes crops (patches are cut from "
            "the photos on demand)",
            DeprecationWarning,
            stacklevel=2,
        )
    pattern = _check_options(group_by, parallel, engine, scheduler, group_pattern)
    template = IntakeJob(
        path="",
        name="",
        tile_px=workspace.tile_px,
        overlap=overlap,
        tile_mm=tile_mm,
        rec={},
        scale=scale or ScaleOptions(),
        group="",
        date=None,
        known_hash=None,
        max_pixels=max_pixels or DEFAULT_MAX_PIXELS,
        skip_flagged=skip_flagged,
    )
    tally = _Tally(workspace)
    jobs, problems, skipped = _plan_jobs(
        photos, template, tally.known, sidecar or {}, roots or {}, pattern, group_by
    )
    tally.problems.extend(problems)
    tally.counts["photos_skipped"] += skipped
    n_workers = max(1, min(workers or usable_cores(), len(jobs)))
    known_hashes = frozenset(tally.known.values())
    t0 = time.perf_counter()
    if engine == "dask":
        results = _dask(jobs, known_hashes, scheduler or "")
    else:
        results = _local(jobs, known_hashes, n_workers, parallel)
    # One connection held open for the run: SQLite checkpoints its write-ahead log into
    # the database when the last connection closes, which would be at every photo.
    with workspace.connect(), closing(results):  # closing: stop the workers on an error
        for i, (job, res) in enumerate(zip(jobs, results, strict=True), start=1):
            tally.record(job, res)
            if progress:
                progress(i, len(jobs), res["name"])
    wall = time.perf_counter() - t0
    added = tally.counts["photos_added"]
    return {
        **tally.counts,
        "problems": tally.problems,
        "notes": tally.notes,
        "seconds": round(wall, 3),
        "photos_per_second": round(added / wall, 3) if wall > 0 and added else 0.0,
        "decode_share": round(tally.decode_s / tally.total_s, 3) if tally.total_s > 0 else None,
        "workers": n_workers,
        "engine": engine,
    }


def check_engine(engine: str, scheduler: str | None) -> None:
    """Refuse an unknown engine, or the Dask engine without a scheduler's address."""
    if engine not in ENGINES:
        raise TilingError(f"invalid engine {engine!r}; choose one of: {', '.join(ENGINES)}")
    if engine == "dask" and not scheduler:
        raise TilingError("the dask engine needs --scheduler ADDRESS (e.g. tcp://127.0.0.1:8786)")


def _check_options(
    group_by: str, parallel: str, engine: str, scheduler: str | None, group_pattern: str | None
):
    """Validate the choices of :func:`tile_into_workspace`; returns the compiled group pattern."""
    import re

    if group_by not in ("sidecar", "photo"):
        raise TilingError(f"invalid group_by {group_by!r}; choose one of: sidecar, photo")
    if parallel not in PARALLEL_MODES:
        raise TilingError(
            f"invalid parallel mode {parallel!r}; choose one of: {', '.join(PARALLEL_MODES)}"
        )
    check_engine(engine, scheduler)
    try:
        return re.compile(group_pattern) if group_pattern else None
    except re.error as exc:
        raise TilingError(
            f"--group-pattern {group_pattern!r} is not a valid regular expression ({exc})"
        ) from None


def _plan_jobs(
    photos: list[Path],
    template: IntakeJob,
    known: dict[str, str],
    sidecar: dict[str, dict],
    roots: dict[Path, Path],
    pattern,
    group_by: str,
) -> tuple[list[IntakeJob], list[str], int]:
    """One :class:`IntakeJob` per distinct, UTF-8-named photo; problems as one line each, and
    the number of photos skipped for their names."""
    import os
    from dataclasses import replace

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
            )
        )
    return jobs, problems, skipped


def _in_order(submit: Callable, jobs: list[IntakeJob], ahead: int) -> Iterator[dict]:
    """Results of ``submit(job).result()`` in job order, with at most ``ahead`` jobs
    submitted and not yet handed on (the results that finish early wait in order)."""
    pending: deque = deque(submit(job) for job in jobs[:ahead])
    following = iter(jobs[ahead:])
    while pending:
        res = pending.popleft().result()
        job = next(following, None)
        if job is not None:
            pending.append(submit(job))
        yield res


def _local(
    jobs: list[IntakeJob], known_hashes: frozenset, n_workers: int, parallel: str
) -> Iterator[dict]:
    """Results of :func:`_process` for each job, in job order, from local workers."""
    import multiprocessing
    from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor

    import cv2

    if n_workers <= 1:
        threads = cv2.getNumThreads()
        cv2.setNumThreads(1)  # one process, one core: as each pool worker runs
        try:
            for job in jobs:
                yield _process(job, known_hashes)
        finally:
            cv2.setNumThreads(threads)
        return
    pool: Executor
    if parallel == "threads":
        # Decoding, hashing and the quality measures (OpenCV) release the GIL.
        pool = ThreadPoolExecutor(n_workers)
        task: Callable = lambda job: pool.submit(_process, job, known_hashes)  # noqa: E731
    else:
        # forkserver, not fork: forking a process that already runs OpenMP/BLAS threads
        # (torch, OpenCV) can deadlock the child.
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["trainkit.intake.tiling"])
        pool = ProcessPoolExecutor(
            n_workers, mp_context=ctx, initializer=_pool_init, initargs=(known_hashes,)
        )
        task = lambda job: pool.submit(_pool_task, job)  # noqa: E731
    try:
        yield from _in_order(task, jobs, AHEAD_PER_WORKER * n_workers)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _dask(jobs: list[IntakeJob], known_hashes: frozenset, scheduler: str) -> Iterator[dict]:
    """Results of :func:`dask_tile_task` for each job, in job order, from a Dask cluster."""
    try:
        from distributed import Client
    except ImportError:
        raise TilingError(
            "the dask engine needs dask.distributed: pip install 'trainkit-concrete[dask]'"
        ) from None
    try:
        client = Client(scheduler, timeout=DASK_CONNECT_TIMEOUT_S)
    except (OSError, ValueError) as exc:
        raise TilingError(f"cannot reach the Dask scheduler at {scheduler} ({exc})") from None
    try:
        [known] = client.scatter([known_hashes], broadcast=True)
        threads = sum(client.nthreads().values()) or 1
        task = lambda job: client.submit(dask_tile_task, job, known, pure=False)  # noqa: E731
        yield from _in_order(task, jobs, AHEAD_PER_WORKER * threads)
    finally:
        client.close()


class _Tally:
    """Stores each photo's result in the workspace and keeps the run's counts."""

    def __init__(self, workspace: Workspace) -> None:
        self.workspace = workspace
        photos = workspace.photos()
        self.known = {r["name"]: r["sha256"] for r in photos}
        self.source_path = {r["name"]: r["source_path"] for r in photos}
        self.hash_to_name = {r["sha256"]: r["name"] for r in photos}
        self.problems: list[str] = []
        self.notes: list[str] = []
        self.decode_s = self.total_s = 0.0
        self.counts = {
            "photos_added": 0,
            "photos_already_present": 0,
            "photos_moved": 0,
            "photos_skipped": 0,
            "patches_added": 0,
            "patches_flagged": 0,
            "patches_left_out_of_review": 0,
        }

    def record(self, job: IntakeJob, res: dict) -> None:
        counts, st = self.counts, res["status"]
        if st == "present":
            if self.source_path.get(job.name) != job.path:  # found elsewhere: re-pointed
                self.workspace.set_source_path(job.name, job.path)
                counts["photos_moved"] += 1
            else:
                counts["photos_already_present"] += 1
        elif st == "moved":
            self.workspace.set_source_path(self.hash_to_name[res["sha256"]], job.path)
            counts["photos_moved"] += 1
        elif st in ("error", "changed"):
            self.problems.append(res["error"])
            counts["photos_skipped"] += 1
        else:
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
                grid_px=res["grid_px"],
            )
            self.notes.extend(res.get("notes", []))
            counts["photos_added"] += 1
            counts["patches_added"] += len(res["patches"])
            counts["patches_flagged"] += sum(bool(p["flags"]) for p in res["patches"])
            counts["patches_left_out_of_review"] += sum(p["review_skip"] for p in res["patches"])
            self.decode_s += res["seconds_decode"]
            self.total_s += res["seconds_total"]
