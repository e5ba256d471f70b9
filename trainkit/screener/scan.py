"""Batch pre-filter: run an exported screener over folders of frames and write one JSON line per frame.

``frames.jsonl`` is append-only: each finished frame is written as one line and
flushed to disk before the next is written, so stopping and restarting a scan
loses nothing; a frame already in the file with the same path and content hash
is skipped on restart, and a half-written last line (the process was killed
mid-write) is dropped and redone. A frame whose content changed, or that could not
be read at all last time, is scanned again and gets a new line: the LAST line of a
frame describes it as it now is (earlier lines stay as history). ``flagged.txt``
lists the frames whose last line is flagged. Each line counts its ``cells`` and its
``main_model_cells``: those the main network scored (with a cascade model, the cells its
first stage passed; with a single-stage model, every cell).

The summary of a run describes the whole output for the frames given, not only this
run's share: a resumed scan still reports (and exits 1 for) frames recorded as
unreadable by an earlier run (:func:`recorded_line`, :func:`exit_code`).

Frames are recorded by absolute path (older scans stored the path as given; those lines
are read relative to the working folder recorded in ``scan.json``, else the current one).
A frame that cannot be read, decoded or cut is recorded as unreadable with the reason and
named through ``report``, on every engine and option, and the scan goes on; nothing is
written (not even the output folder) until the model has loaded. A model whose outputs
break the contract (NaN probabilities, say) stops the scan instead: no frame is recorded as
scored by it. A failed write (a full disk, say) stops the scan with the path named: every
finished line stays.

Memory: a frame is decoded with at most :data:`SCAN_MAX_PIXELS` pixels (larger ones are
recorded as too large; ``max_pixels`` raises the limit), its cells are cut batch by batch
as the model runs, and frames are decoded ahead only while the frames in flight hold at
most :data:`DECODE_AHEAD_PIXELS` pixels (one frame always goes). Overlays of frames above
:data:`OVERLAY_MAX_PIXELS` are drawn on the frame shrunk by a whole factor (recorded as
``overlay_scale``). A scan at the default limit stays under 1.5 GB of memory whatever
the frames' format.

Engines: ``local`` overlaps decoding and cutting of the next frames (a thread
pool; Pillow releases the GIL while decoding) with inference on the current one,
or with ``workers > 1`` runs one process per worker; ``dask`` sends frames to the
workers of a Dask distributed cluster (each worker must see the model and frame
paths) and streams the results back into the same file.
"""

from __future__ import annotations

import hashlib
import json
import math
import multiprocessing
import os
import time
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path
from typing import Any, cast

import numpy as np

from trainkit.core.cores import usable_cores
from trainkit.core.decode import (
    PhotoError,
    find_images,
    image_pixels,
    read_rgb_fast,
    read_rgb_reduced,
    skipped_files_line,
)
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_text, file_sha256
from trainkit.core.jsonsafe import dumps
from trainkit.screener.model import FramePatches, Screener, ScreenerError

__all__ = [
    "scan_frames",
    "read_done",
    "read_latest",
    "recorded_line",
    "exit_code",
    "FRAMES_FILE",
    "FLAGGED_FILE",
    "OVERLAY_CHOICES",
    "ENGINES",
    "EXIT_UNREADABLE",
    "ScanError",
    "SCAN_MAX_PIXELS",
    "frame_path",
]

FRAMES_FILE = "frames.jsonl"
#: Which model made the scan (rewritten by every run).
SCAN_FILE = "scan.json"
FLAGGED_FILE = "flagged.txt"
OVERLAY_CHOICES = ("flagged", "all", "none")
ENGINES = ("local", "dask")


#: Exit code while any frame of the inputs is recorded as unreadable (the CLI's "skipped" code).
EXIT_UNREADABLE = 1
#: Largest frame the scan decodes, in pixels. Decoding takes up to 7 bytes a pixel at its
#: peak (Pillow holds 8-bit colour in 4 bytes a pixel while it is copied out; OpenCV's JPEG
#: decoder about 6), so this keeps the scan under 1.5 GB. Lower than the kit's tiling limit
#: (250 Mpx, a 16-bit grey or JPEG frame of that size would still fit, an 8-bit colour PNG
#: not); ``max_pixels`` (``--max-megapixels``) raises it.
SCAN_MAX_PIXELS = 160_000_000
#: Frames decoded ahead of the model may hold at most this many pixels between them
#: (about 150 MB of 8-bit RGB); the next frame always goes once nothing else is held.
DECODE_AHEAD_PIXELS = 50_000_000
#: Overlays of larger frames are drawn on the frame shrunk by a whole factor to fit.
OVERLAY_MAX_PIXELS = 25_000_000


class ScanError(ScreenerError):
    """The scan cannot go on (an output cannot be written, an option is out of range)."""


def read_latest(path: Path, base: str | Path | None = None) -> dict[str, dict]:
    """Absolute frame path -> ``{"sha256", "status", "flagged", ...}`` of its LAST line in
    frames.jsonl.

    A torn last line (no newline, or not JSON) is truncated away in place. Older scans
    stored frame paths as given on the command line: those are made absolute against
    ``base`` (the scan's recorded working folder), else against the current folder.
    """
    latest: dict[str, dict] = {}
    if not path.exists():
        return latest
    good_bytes = 0
    with path.open("rb") as fh:
        for raw in fh:
            if not raw.endswith(b"\n"):
                break
            try:
                rec = json.loads(raw)
            except json.JSONDecodeError:
                break
            latest[_absolute(rec["frame"], base)] = _brief(rec)
            good_bytes += len(raw)
    if good_bytes != path.stat().st_size:
        with path.open("r+b") as fh:
            fh.truncate(good_bytes)
    return latest


def _absolute(frame: str | Path, base: str | Path | None = None) -> str:
    return os.path.abspath(os.path.join(base, frame) if base else frame)


def frame_path(scan_dir: str | Path, recorded: str) -> Path:
    """The file a frames.jsonl line names: absolute as recorded, or (an older scan's
    relative path) resolved against the working folder recorded in the scan's scan.json,
    else against the current folder."""
    return Path(_absolute(recorded, _working_folder(Path(scan_dir))))


def _working_folder(out: Path) -> str | None:
    try:
        rec = json.loads((out / SCAN_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    folder = rec.get("working_folder") if isinstance(rec, dict) else None
    return folder if isinstance(folder, str) else None


def _scan_record(
    model: Path, screener: Screener, working_folder: str, model_sha256: str | None
) -> dict:
    """Which model scanned (its path and file digest, for the job check that may follow),
    and the folder that older relative frame paths in frames.jsonl are relative to."""
    import datetime as _dt

    info = screener.info
    return {
        "model": str(model.resolve()),
        "model_sha256": model_sha256,
        "contract": info.version,
        "threshold": info.threshold,
        "data_digest": info.data_digest,
        "kit_version": info.kit_version,
        "familiarity_threshold": (info.familiarity or {}).get("threshold"),
        "cascade_pass_threshold": (info.cascade or {}).get("pass_threshold"),
        # job frames the model learned from (trainkit train --from): kept out of job checks
        "learned_frames": Experiment(model.parent).learned_frames(),
        "updated": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "working_folder": working_folder,
    }


def _brief(rec: dict) -> dict:
    return {
        "sha256": rec.get("sha256"),
        "status": rec.get("status"),
        "flagged": bool(rec.get("flagged")),
        "unfamiliar": rec.get("unfamiliar"),
        "cells": rec.get("cells"),
        "main_model_cells": rec.get("main_model_cells"),
        "error": rec.get("error"),
        "max_pixels": rec.get("max_pixels"),
    }


def read_done(path: Path) -> dict[str, str | None]:
    """Frame path -> content hash of its last line in frames.jsonl (None: it could not be read).

    A torn last line (no newline, or not JSON) is truncated away in place.
    """
    return {frame: r["sha256"] for frame, r in read_latest(path).items()}


def _needs_scan(path: Path, last: dict | None, max_pixels: int = SCAN_MAX_PIXELS) -> bool:
    """True unless the frame's last line was made from the same content (same hash).

    A frame that failed under a lower pixel limit than ``max_pixels`` (``--max-megapixels``
    raised since) is tried again.
    """
    if last is None or last["sha256"] is None:  # never scanned, or could not be read then
        return True
    if last["status"] != "ok" and (last.get("max_pixels") or 0) < max_pixels:
        return True
    try:
        return last["sha256"] != hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:  # unreadable now: scanning records that
        return True


def _recorded_counts(frames: list[Path], latest: dict[str, dict], now: set[str]) -> dict:
    """What frames.jsonl now says about ``frames`` (their last lines)."""
    recs = [(str(p), latest[str(p)]) for p in frames if str(p) in latest]
    bad = [f for f, r in recs if r["status"] != "ok"]
    return {
        "recorded": len(recs),
        "unreadable": len(bad),
        "unreadable_earlier": sum(f not in now for f in bad),
        "flagged_recorded": sum(bool(r["flagged"]) for _, r in recs),
        # cells of the recorded frames, and those the main network scored (a cascade's
        # first stage passed them; every cell of a single-stage model)
        "cells_recorded": sum(r.get("cells") or 0 for _, r in recs),
        "main_model_cells_recorded": sum(r.get("main_model_cells") or 0 for _, r in recs),
        # None when the model has no familiarity output (contract version 1)
        "unfamiliar_recorded": sum(bool(r.get("unfamiliar")) for _, r in recs)
        if any(r.get("unfamiliar") is not None for _, r in recs)
        else None,
    }


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def recorded_line(summary: dict) -> str:
    """One line on the whole output for the frames given, e.g. ``6 frames in this folder
    recorded, of which 4 unreadable (4 recorded earlier)``.

    Args:
        summary: the dict returned by :func:`scan_frames`.
    """
    inputs = summary.get("inputs", [])
    where = (
        "in this folder"
        if len(inputs) == 1 and Path(inputs[0]).is_dir()
        else "of this file"
        if len(inputs) == 1
        else f"of these {len(inputs)} inputs"
    )
    return (
        f"{_plural(summary['recorded'], 'frame')} {where} recorded, of which "
        f"{summary['unreadable']} unreadable ({summary['unreadable_earlier']} recorded earlier)"
    )


def exit_code(summary: dict) -> int:
    """:data:`EXIT_UNREADABLE` while any frame of the inputs is recorded as unreadable, else 0.

    Args:
        summary: the dict returned by :func:`scan_frames`.
    """
    return EXIT_UNREADABLE if summary["unreadable"] else 0


def _decode_and_cut(
    screener: Screener, path: Path, gsd_mm: float | None, max_pixels: int = SCAN_MAX_PIXELS
) -> tuple[dict, FramePatches | None, object]:
    """Read, hash, decode and cut one frame; returns (record so far, patches or None, rgb).

    Any failure is recorded in the record (status ``error`` and the reason), never raised:
    one bad frame does not stop a scan, whatever the engine or options.
    """
    t0 = time.perf_counter()
    rec: dict = {"frame": str(path)}
    try:
        data = path.read_bytes()
    except OSError as exc:
        rec.update(status="error", error=f"frame {path.name} cannot be read ({exc})")
        return rec, None, None
    rec["sha256"] = hashlib.sha256(data).hexdigest()
    notes: list[str] = []
    try:
        rgb, reduced = _read_for_model(screener, path, data, gsd_mm, max_pixels, notes)
        del data
        if reduced is None:
            fp = screener.cut(rgb, gsd_mm=gsd_mm)
        else:  # decoded at reduced size: the Screener reports boxes in full-size pixels
            fp = screener.cut(rgb, gsd_mm=gsd_mm, full_size=reduced[:2])
        if reduced is not None or fp.source is not rgb:
            rgb = None  # reduced or resampled: an overlay decodes the full frame again
    except (PhotoError, ScreenerError) as exc:
        rec.update(status="error", error=str(exc), max_pixels=max_pixels)
        return rec, None, None
    except Exception as exc:  # any other failure of one frame: recorded, the scan goes on
        rec.update(
            status="error",
            error=f"frame {path.name} cannot be scanned ({type(exc).__name__}: {exc})",
            max_pixels=max_pixels,
        )
        return rec, None, None
    if notes:
        rec["notes"] = notes
    rec["seconds_decode"] = round(time.perf_counter() - t0, 4)
    return rec, fp, rgb


def _read_for_model(
    screener: Screener,
    path: Path,
    data: bytes,
    gsd_mm: float | None,
    max_pixels: int,
    notes: list[str],
):
    """Decode a frame; a JPEG that the model will downscale at least 2x is decoded at reduced size.

    Returns (rgb, None) normally, or (rgb, (full_height, full_width, k)) when the JPEG
    decoder's reduced-size mode was used, k being full-size pixels per decoded pixel.
    """
    if gsd_mm is not None and screener.patch_mm and data[:2] == b"\xff\xd8":
        factor = screener.patch_px / (screener.patch_mm / gsd_mm)  # model px per frame px
        if factor <= 0.5:
            return read_rgb_reduced(
                path, data=data, scale=factor, max_pixels=max_pixels, notes=notes
            )
    return read_rgb_fast(path, data=data, max_pixels=max_pixels, notes=notes), None


def _finish(
    screener: Screener, rec: dict, frame: list, overlays: str, overlay_dir: Path | None
) -> dict:
    """Score a cut frame and complete its record (and overlay).

    ``frame`` is ``[patches, rgb]`` from :func:`_decode_and_cut`; it is emptied here, so that
    the cut frame is freed once the model has scored it (before an overlay may decode the
    frame again).
    """
    fp, rgb = frame
    frame.clear()
    t0 = time.perf_counter()
    # A model whose outputs break the contract (NaN, say) raises here and stops the scan:
    # the fault is the model's, and no frame may be recorded as scored by it.
    cm = screener.crack_map_from_patches(fp)
    width, height = fp.width, fp.height
    del fp  # the (resampled) frame is not needed any more
    cells = cm.flagged_cells()
    rec.update(
        status="ok",
        width=width,
        height=height,
        flagged=bool(cells),
        max_probability=round(float(cm.probabilities.max()), 4),
        flagged_cells=len(cells),
        cells=int(cm.flagged.size),
        main_model_cells=cm.main_model_cells,
        dominant_class=cm.dominant_class(),
        threshold=cm.threshold,
        warnings=cm.warnings,
        familiarity_score=None
        if cm.familiarity is None
        else round(cast(float, cm.familiarity_score), 3),
        unfamiliar=cm.unfamiliar,
        flagged_boxes=[{k: c[k] for k in ("box", "probability", "class")} for c in cells],
        # Every cell, for a job's acceptance sample (`trainkit sample`): the grid's column
        # and row extents in frame pixels, and each cell's screening probability.
        grid={
            "x": cm.boxes[0, :, [0, 2]].T.tolist(),
            "y": cm.boxes[:, 0, [1, 3]].tolist(),
        },
        cell_probabilities=np.round(cm.probabilities, 4).tolist(),
        seconds_model=round(time.perf_counter() - t0, 4),
    )
    if overlay_dir is not None and (overlays == "all" or (overlays == "flagged" and cells)):
        _write_overlay(rec, cm, rgb, overlay_dir)
    return rec


def _write_overlay(rec: dict, cm, rgb, overlay_dir: Path) -> None:
    """Draw and write the frame's overlay (shrunk when the frame is large, see
    :data:`OVERLAY_MAX_PIXELS`); a frame that cannot be read again gets a warning instead."""
    frame = Path(rec["frame"])
    if rgb is None:
        try:
            data = frame.read_bytes()
            if hashlib.sha256(data).hexdigest() != rec["sha256"]:
                raise PhotoError(f"photo {frame.name} changed while it was scanned")
            rgb = read_rgb_fast(frame, data=data, max_pixels=rec["width"] * rec["height"])
        except (OSError, PhotoError) as exc:
            rec["warnings"] = [*rec["warnings"], f"no overlay drawn ({exc})"]
            return
    h, w = rgb.shape[:2]
    k = math.ceil(math.sqrt(h * w / OVERLAY_MAX_PIXELS)) if h * w > OVERLAY_MAX_PIXELS else 1
    if k > 1:
        import dataclasses

        edges = np.concatenate([cm.boxes[..., :2] // k, -(-cm.boxes[..., 2:] // k)], axis=-1)
        cm, rgb = dataclasses.replace(cm, boxes=edges), _shrink(rgb, k)
        rec["overlay_scale"] = k
    picture = cm.overlay(rgb)
    del rgb
    name = f"{frame.stem}-{rec['sha256'][:8]}-overlay.jpg"
    with _writing(overlay_dir / name), atomic_path(overlay_dir / name) as tmp:
        picture.save(tmp, quality=88)
    rec["overlay"] = _absolute(overlay_dir / name)


def _shrink(rgb: np.ndarray, k: int) -> np.ndarray:
    """``rgb`` made k times smaller by averaging k x k blocks (Pillow's ``reduce``), in
    strips of whole blocks, so only a strip is ever copied into Pillow."""
    from PIL import Image

    h, w = rgb.shape[:2]
    rows = k * max(1, 4_000_000 // max(1, w * k))
    parts = [
        np.asarray(Image.fromarray(np.ascontiguousarray(rgb[y : y + rows])).reduce(k))
        for y in range(0, h, rows)
    ]
    return np.concatenate(parts)


def _scan_one(
    screener: Screener,
    path: Path,
    gsd_mm,
    overlays: str,
    overlay_dir: Path | None,
    max_pixels: int = SCAN_MAX_PIXELS,
) -> dict:
    rec, *frame = _decode_and_cut(screener, path, gsd_mm, max_pixels)
    if frame[0] is None:
        return rec
    return _finish(screener, rec, frame, overlays, overlay_dir)


class _Writing:
    """Turns an OSError while writing ``path`` into a :class:`ScanError` that names it."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind, exc, tb) -> None:
        if isinstance(exc, OSError):
            why = exc.strerror or str(exc)
            raise ScanError(
                f"cannot write {self.path} ({why}); the frames finished so far are kept: "
                "free space (or fix the folder) and run the same scan again to continue"
            ) from None


def _writing(path: Path) -> _Writing:
    return _Writing(path)


# ----- engines ---------------------------------------------------------------------------


def _local_pipelined(
    screener: Screener,
    paths: list[Path],
    gsd_mm,
    overlays,
    overlay_dir,
    ahead: int = 2,
    max_pixels: int = SCAN_MAX_PIXELS,
) -> Iterator[dict]:
    """Decode and cut up to ``ahead`` frames in background threads while the model runs.

    The frames in flight (decoding, decoded, or being scored) hold at most
    :data:`DECODE_AHEAD_PIXELS` pixels between them by their headers; the next frame always
    goes once nothing else is held, so large frames are taken one at a time.

    With several cores the decoding is queued on the Screener's own worker threads,
    between the model's batches, so no more threads run than there are cores. (Side by
    side with a separate decode thread, 3 rounds of 24 frames each, the two were within
    the machine's noise: 1.73-2.13 against 1.93-2.10 frames/s; one thread per core is
    kept because it cannot oversubscribe a smaller CPU share.)
    """
    shared = screener.executor
    own = None if shared is not None else ThreadPoolExecutor(1, "trainkit-decode")
    pool = cast(ThreadPoolExecutor, shared or own)
    todo = deque(paths)
    pending: deque = deque()  # (future, pixels) in frame order
    held = 0  # pixels of the frames submitted and not yet finished

    def fill(current: int) -> None:
        nonlocal held
        while todo and len(pending) + (current > 0) <= ahead:
            px = image_pixels(todo[0]) or 0
            if held > 0 and held + px > DECODE_AHEAD_PIXELS:
                return
            held += px
            p = todo.popleft()
            pending.append((pool.submit(_decode_and_cut, screener, p, gsd_mm, max_pixels), px))

    try:
        while todo or pending:
            fill(0)
            fut, px = pending.popleft()
            rec, *frame = fut.result()
            del fut  # it holds the result too: the frame is freed as soon as _finish lets go
            fill(px)  # the next frames decode while the model scores this one
            try:
                if frame[0] is None:
                    yield rec
                else:
                    yield _finish(screener, rec, frame, overlays, overlay_dir)
            finally:
                frame.clear()
                held -= px
    finally:
        if own is not None:
            own.shutdown(wait=True, cancel_futures=True)


_WORKER: dict[str, Screener] = {}


def _worker_screener(model: str, threads: int) -> Screener:
    s = _WORKER.get(model)
    if s is None:
        s = _WORKER[model] = Screener(model, threads=threads)
    return s


def _pool_task(args: tuple) -> dict:
    model, threads, path, gsd, overlays, ov, max_pixels = args
    return _scan_one(
        _worker_screener(model, threads),
        Path(path),
        gsd,
        overlays,
        Path(ov) if ov else None,
        max_pixels,
    )


def dask_scan_task(
    model: str,
    path: str,
    gsd_mm,
    overlays: str,
    overlay_dir: str | None,
    max_pixels: int = SCAN_MAX_PIXELS,
) -> dict:
    """One frame on a Dask worker (the Screener is cached per worker process)."""
    return _scan_one(
        _worker_screener(model, 1),
        Path(path),
        gsd_mm,
        overlays,
        Path(overlay_dir) if overlay_dir else None,
        max_pixels,
    )


def _local_pool(model, paths, gsd_mm, overlays, overlay_dir, workers, max_pixels) -> Iterator[dict]:
    threads = max(1, usable_cores() // workers)
    ctx = multiprocessing.get_context("forkserver")  # fork could deadlock on runtime threads
    ov = str(overlay_dir) if overlay_dir else None
    jobs = [(str(model), threads, str(p), gsd_mm, overlays, ov, max_pixels) for p in paths]
    with ProcessPoolExecutor(workers, mp_context=ctx) as pool:
        yield from pool.map(_pool_task, jobs, chunksize=2)


def _dask(
    model, paths, gsd_mm, overlays, overlay_dir, scheduler: str | None, max_pixels: int
) -> Iterator[dict]:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise ScreenerError(
            "the dask engine needs dask.distributed: pip install 'trainkit-concrete[dask]'"
        ) from None
    ov = str(overlay_dir.resolve()) if overlay_dir else None
    try:
        client = Client(scheduler, timeout=30)
    except OSError as exc:
        raise ScreenerError(f"cannot reach the Dask scheduler at {scheduler} ({exc})") from None
    try:
        futures = [
            client.submit(
                dask_scan_task,
                str(Path(model).resolve()),
                str(Path(p).resolve()),
                gsd_mm,
                overlays,
                ov,
                max_pixels,
                pure=False,
            )
            for p in paths
        ]
        original = {str(Path(p).resolve()): str(p) for p in paths}
        for fut in as_completed(futures):
            rec = fut.result()
            rec["frame"] = original.get(rec["frame"], rec["frame"])  # report paths as given
            yield rec
    finally:
        client.close()


def scan_frames(
    model: str | Path,
    inputs: list[Path],
    out_dir: str | Path,
    *,
    workers: int = 1,
    gsd_mm: float | None = None,
    overlays: str | bool = "flagged",
    engine: str = "local",
    scheduler: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    report: Callable[[str], None] | None = None,
    max_pixels: int = SCAN_MAX_PIXELS,
) -> dict:
    """Scan frames into ``out_dir/frames.jsonl``, ``flagged.txt`` and overlays.

    Args:
        model: the exported ONNX screener.
        inputs: image files and folders (folders are searched recursively).
        out_dir: output folder; an existing frames.jsonl is resumed.
        workers: local processes (1 = this process, decoding overlapped with inference).
        gsd_mm: scale of the frames in mm per pixel, if known.
        overlays: "flagged" (overlay images of flagged frames), "all" or "none".
        engine: "local" or "dask" (then ``scheduler`` is the scheduler's address).
        progress: called with (done, total) after each frame.
        report: called with one line for each thing the user should hear about: files in
            the folders that are not photos the kit reads (one line for all), each frame
            recorded as unreadable (by this run, or by an earlier one and unchanged since),
            each frame's notes (e.g. only page 1 of a multi-page file is used).
        max_pixels: frames with more pixels are recorded as too large
            (:data:`SCAN_MAX_PIXELS`; the memory a frame takes grows with it).

    Returns:
        This run's counts: ``frames`` (found in the inputs), ``resumed_skip`` (unchanged since
        their last line), ``scanned``, ``flagged`` and ``errors`` (lines written by this
        run), ``cells`` and ``main_model_cells`` (of this run's frames, those the main network
        scored: the cells a cascade's first stage passed, else all), ``seconds``,
        ``frames_per_second``, ``skipped_files`` (files in the folders that are not photos);
        and what frames.jsonl now says about the frames of the inputs (their last lines):
        ``recorded``, of which ``unreadable``, of which ``unreadable_earlier`` (not written
        by this run), ``flagged_recorded``, ``cells_recorded`` and
        ``main_model_cells_recorded``.
        ``unreadable`` used to be this run's ``errors``; it now counts the whole output.

    Raises:
        PhotoError: the inputs hold no image file (as ``trainkit tile`` says it).
        ScreenerError: the model cannot be used (nothing is written then).
        ScanError: an option is out of range, or an output cannot be written (the path is
            named; finished lines are kept).
    """
    say = report or (lambda _line: None)
    if overlays is True:
        overlays = "flagged"
    elif overlays is False:
        overlays = "none"
    if overlays not in OVERLAY_CHOICES:
        raise ScanError(
            f"invalid overlays {overlays!r}; choose one of: {', '.join(OVERLAY_CHOICES)}"
        )
    if engine not in ENGINES:
        raise ScanError(f"invalid engine {engine!r}; choose one of: {', '.join(ENGINES)}")
    if engine == "dask" and not scheduler:
        raise ScanError("the dask engine needs --scheduler ADDRESS (e.g. tcp://127.0.0.1:8786)")
    if gsd_mm is not None:
        try:
            gsd_mm = float(gsd_mm)
        except (TypeError, ValueError):
            gsd_mm = math.nan
        if not (math.isfinite(gsd_mm) and gsd_mm > 0):
            raise ScanError(f"gsd_mm must be a finite number above 0, got {gsd_mm}")
    out = Path(out_dir)
    skipped: list[Path] = []
    frames = _find_frames(inputs, out, skipped)
    if not frames:
        other = (
            f" ({_plural(len(skipped), 'other file')}, e.g. {skipped[0].name})" if skipped else ""
        )
        raise PhotoError(f"no image files found in {', '.join(map(str, inputs))}{other}")
    if skipped:
        say(skipped_files_line(skipped))
    try:  # the file as loaded, for verify to compare; an unreadable one: loading says why
        model_sha256: str | None = file_sha256(model)
    except OSError:
        model_sha256 = None
    screener = Screener(model)  # validates the model before anything is written
    working_folder = _working_folder(out) or os.getcwd()
    with _writing(out):
        out.mkdir(parents=True, exist_ok=True)
    overlay_dir = out / "overlays" if overlays != "none" else None
    if overlay_dir:
        with _writing(overlay_dir):
            overlay_dir.mkdir(exist_ok=True)
    frames_path = out / FRAMES_FILE
    latest = read_latest(frames_path, working_folder)
    todo = [p for p in frames if _needs_scan(p, latest.get(str(p)), max_pixels)]
    again = set(todo)
    for p in frames:
        last = latest.get(str(p))
        if p not in again and last and last["status"] != "ok":
            why = last.get("error") or f"frame {p.name} is unreadable"
            say(f"{why}; skipped (recorded by an earlier run)")
    written: set[str] = set()
    counts: dict[str, Any] = {
        "frames": len(frames),
        "resumed_skip": len(frames) - len(todo),
        "scanned": 0,
        "flagged": 0,
        "errors": 0,
        "cells": 0,
        "main_model_cells": 0,
        "skipped_files": len(skipped),
    }
    t0 = time.perf_counter()
    try:
        with _writing(frames_path):
            fh = frames_path.open("a", encoding="utf-8")
    except ScanError:
        screener.close()
        raise
    with screener, fh:

        def write(rec: dict) -> None:
            with _writing(frames_path):
                fh.write(dumps(rec) + "\n")
                fh.flush()
                os.fsync(fh.fileno())
            latest[rec["frame"]] = _brief(rec)
            written.add(rec["frame"])
            counts["scanned"] += 1
            counts["flagged"] += bool(rec.get("flagged"))
            counts["errors"] += rec["status"] != "ok"
            counts["cells"] += rec.get("cells") or 0
            counts["main_model_cells"] += rec.get("main_model_cells") or 0
            if rec["status"] != "ok":
                say(f"{rec['error']}; skipped")
            for note in rec.get("notes", []):
                say(note)
            if progress:
                progress(counts["resumed_skip"] + counts["scanned"], len(frames))

        if engine == "dask":
            results = _dask(model, todo, gsd_mm, overlays, overlay_dir, scheduler, max_pixels)
        elif workers <= 1:
            results = _local_pipelined(
                screener, todo, gsd_mm, overlays, overlay_dir, max_pixels=max_pixels
            )
        else:
            results = _local_pool(model, todo, gsd_mm, overlays, overlay_dir, workers, max_pixels)
        for rec in results:
            write(rec)
    seconds = time.perf_counter() - t0
    flagged = sorted(f for f, r in latest.items() if r["flagged"])
    with _writing(out / FLAGGED_FILE):
        atomic_write_text(out / FLAGGED_FILE, "".join(f"{f}\n" for f in flagged))
    counts["seconds"] = round(seconds, 3)
    counts["frames_per_second"] = round(counts["scanned"] / seconds, 3) if seconds > 0 else 0.0
    counts["frames_file"] = str(frames_path)
    counts["inputs"] = [str(p) for p in inputs]
    counts["notes"] = list(screener.notes)
    record = _scan_record(Path(model), screener, working_folder, model_sha256)
    with _writing(out / SCAN_FILE):
        atomic_write_text(out / SCAN_FILE, dumps(record, indent=2))
    counts.update(_recorded_counts(frames, latest, written))
    return counts


def _find_frames(inputs: list[Path], out: Path, skipped: list[Path]) -> list[Path]:
    """The image files of the inputs as absolute paths, leaving out the scan's own output
    folder (its overlays are not frames); other files in the folders go to ``skipped``."""
    own = _absolute(out)
    found = []
    for p, _ in find_images(list(inputs), skipped=skipped):
        a = Path(_absolute(p))
        if not (str(a) == own or str(a).startswith(own + os.sep)):
            found.append(a)
    skipped[:] = [q for q in skipped if not _absolute(q).startswith(own + os.sep)]
    return found
