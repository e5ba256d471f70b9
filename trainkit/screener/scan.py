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

Engines: ``local`` overlaps decoding and cutting of the next frames (a thread
pool; Pillow releases the GIL while decoding) with inference on the current one,
or with ``workers > 1`` runs one process per worker; ``dask`` sends frames to the
workers of a Dask distributed cluster (each worker must see the model and frame
paths) and streams the results back into the same file.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from pathlib import Path

import numpy as np

from trainkit.core.cores import usable_cores
from trainkit.core.decode import PhotoError, find_images, read_rgb_fast
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_json, atomic_write_text
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
]

FRAMES_FILE = "frames.jsonl"
#: Which model made the scan (rewritten by every run).
SCAN_FILE = "scan.json"
FLAGGED_FILE = "flagged.txt"
OVERLAY_CHOICES = ("flagged", "all", "none")
ENGINES = ("local", "dask")


#: Exit code while any frame of the inputs is recorded as unreadable (the CLI's "skipped" code).
EXIT_UNREADABLE = 1


def read_latest(path: Path) -> dict[str, dict]:
    """Frame path -> ``{"sha256", "status", "flagged"}`` of its LAST line in frames.jsonl.

    A torn last line (no newline, or not JSON) is truncated away in place.
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
            latest[rec["frame"]] = _brief(rec)
            good_bytes += len(raw)
    if good_bytes != path.stat().st_size:
        with path.open("r+b") as fh:
            fh.truncate(good_bytes)
    return latest


def _scan_record(model: Path, screener: Screener) -> dict:
    """Which model scanned (for the job check that may follow)."""
    import datetime as _dt

    info = screener.info
    return {
        "model": str(model.resolve()),
        "contract": info.version,
        "threshold": info.threshold,
        "data_digest": info.data_digest,
        "kit_version": info.kit_version,
        "familiarity_threshold": (info.familiarity or {}).get("threshold"),
        "cascade_pass_threshold": (info.cascade or {}).get("pass_threshold"),
        # job frames the model learned from (trainkit train --from): kept out of job checks
        "learned_frames": Experiment(model.parent).learned_frames(),
        "updated": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
    }


def _brief(rec: dict) -> dict:
    return {
        "sha256": rec.get("sha256"),
        "status": rec.get("status"),
        "flagged": bool(rec.get("flagged")),
        "unfamiliar": rec.get("unfamiliar"),
        "cells": rec.get("cells"),
        "main_model_cells": rec.get("main_model_cells"),
    }


def read_done(path: Path) -> dict[str, str | None]:
    """Frame path -> content hash of its last line in frames.jsonl (None: it could not be read).

    A torn last line (no newline, or not JSON) is truncated away in place.
    """
    return {frame: r["sha256"] for frame, r in read_latest(path).items()}


def _needs_scan(path: Path, last: dict | None) -> bool:
    """True unless the frame's last line was made from the same content (same hash)."""
    if last is None or last["sha256"] is None:  # never scanned, or could not be read then
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
    screener: Screener, path: Path, gsd_mm: float | None
) -> tuple[dict, FramePatches | None, object]:
    """Read, hash, decode and cut one frame; returns (record so far, patches or None, rgb)."""
    t0 = time.perf_counter()
    rec: dict = {"frame": str(path)}
    try:
        data = path.read_bytes()
    except OSError as exc:
        rec.update(status="error", error=f"frame {path.name} cannot be read ({exc})")
        return rec, None, None
    rec["sha256"] = hashlib.sha256(data).hexdigest()
    try:
        rgb, reduced = _read_for_model(screener, path, data, gsd_mm)
        if reduced is None:
            fp = screener.cut(rgb, gsd_mm=gsd_mm)
        else:  # decoded at reduced size: the Screener reports boxes in full-size pixels
            fp = screener.cut(rgb, gsd_mm=gsd_mm, full_size=reduced[:2])
            rgb = None  # overlays need the full frame: decode again only if one is drawn
    except (PhotoError, ValueError) as exc:
        rec.update(status="error", error=str(exc))
        return rec, None, None
    rec["seconds_decode"] = round(time.perf_counter() - t0, 4)
    return rec, fp, rgb


def _read_for_model(screener: Screener, path: Path, data: bytes, gsd_mm: float | None):
    """Decode a frame; a JPEG that the model will downscale at least 2x is decoded at reduced size.

    Returns (rgb, None) normally, or (rgb, (full_height, full_width, k)) when the JPEG
    decoder's reduced-size mode was used, k being full-size pixels per decoded pixel.
    """
    if gsd_mm is None or not screener.patch_mm or data[:2] != b"\xff\xd8":
        return read_rgb_fast(path, data=data), None
    factor = screener.patch_px / (screener.patch_mm / gsd_mm)  # model px per frame px
    if factor > 0.5:
        return read_rgb_fast(path, data=data), None
    import io

    from PIL import Image, ImageOps

    with Image.open(io.BytesIO(data)) as im:
        w0, h0 = im.size
        orientation = im.getexif().get(0x0112, 1)
        im.draft("RGB", (max(1, int(w0 * factor)), max(1, int(h0 * factor))))
        small = ImageOps.exif_transpose(im.convert("RGB"))
    full_w, full_h = (h0, w0) if orientation in (5, 6, 7, 8) else (w0, h0)
    if small.size[0] >= full_w:  # the decoder did not reduce
        return np.asarray(small), None
    return np.asarray(small), (full_h, full_w, full_w / small.size[0])


def _finish(
    screener: Screener, rec: dict, fp: FramePatches, rgb, overlays: str, overlay_dir: Path | None
) -> dict:
    t0 = time.perf_counter()
    cm = screener.crack_map_from_patches(fp)
    cells = cm.flagged_cells()
    rec.update(
        status="ok",
        width=fp.width,
        height=fp.height,
        flagged=bool(cells),
        max_probability=round(float(cm.probabilities.max()), 4),
        flagged_cells=len(cells),
        cells=int(cm.flagged.size),
        main_model_cells=cm.main_model_cells,
        dominant_class=cm.dominant_class(),
        threshold=cm.threshold,
        warnings=cm.warnings,
        familiarity_score=None if cm.familiarity is None else round(cm.familiarity_score, 3),
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
        if rgb is None:
            rgb = read_rgb_fast(Path(rec["frame"]), data=Path(rec["frame"]).read_bytes())
        name = f"{Path(rec['frame']).stem}-{rec['sha256'][:8]}-overlay.jpg"
        with atomic_path(overlay_dir / name) as tmp:
            cm.overlay(rgb).save(tmp, quality=88)
        rec["overlay"] = str(overlay_dir / name)
    return rec


def _scan_one(
    screener: Screener, path: Path, gsd_mm, overlays: str, overlay_dir: Path | None
) -> dict:
    rec, fp, rgb = _decode_and_cut(screener, path, gsd_mm)
    if fp is None:
        return rec
    return _finish(screener, rec, fp, rgb, overlays, overlay_dir)


# ----- engines ---------------------------------------------------------------------------


def _local_pipelined(
    screener: Screener, paths: list[Path], gsd_mm, overlays, overlay_dir, ahead: int = 2
) -> Iterator[dict]:
    """Decode and cut up to ``ahead`` frames in background threads while the model runs.

    With several cores the decoding is queued on the Screener's own worker threads,
    between the model's batches, so no more threads run than there are cores. (Side by
    side with a separate decode thread, 3 rounds of 24 frames each, the two were within
    the machine's noise: 1.73-2.13 against 1.93-2.10 frames/s; one thread per core is
    kept because it cannot oversubscribe a smaller CPU share.)
    """
    shared = screener.executor
    own = None if shared is not None else ThreadPoolExecutor(1, "trainkit-decode")
    pool = shared or own
    try:
        pending = []
        it = iter(paths)
        for p in it:
            pending.append(pool.submit(_decode_and_cut, screener, p, gsd_mm))
            if len(pending) > ahead:
                break
        while pending:
            rec, fp, rgb = pending.pop(0).result()
            nxt = next(it, None)
            if nxt is not None:
                pending.append(pool.submit(_decode_and_cut, screener, nxt, gsd_mm))
            yield rec if fp is None else _finish(screener, rec, fp, rgb, overlays, overlay_dir)
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
    model, threads, path, gsd, overlays, ov = args
    return _scan_one(
        _worker_screener(model, threads), Path(path), gsd, overlays, Path(ov) if ov else None
    )


def dask_scan_task(model: str, path: str, gsd_mm, overlays: str, overlay_dir: str | None) -> dict:
    """One frame on a Dask worker (the Screener is cached per worker process)."""
    return _scan_one(
        _worker_screener(model, 1),
        Path(path),
        gsd_mm,
        overlays,
        Path(overlay_dir) if overlay_dir else None,
    )


def _local_pool(model, paths, gsd_mm, overlays, overlay_dir, workers) -> Iterator[dict]:
    threads = max(1, usable_cores() // workers)
    ctx = multiprocessing.get_context("forkserver")  # fork could deadlock on runtime threads
    ov = str(overlay_dir) if overlay_dir else None
    jobs = [(str(model), threads, str(p), gsd_mm, overlays, ov) for p in paths]
    with ProcessPoolExecutor(workers, mp_context=ctx) as pool:
        yield from pool.map(_pool_task, jobs, chunksize=2)


def _dask(model, paths, gsd_mm, overlays, overlay_dir, scheduler: str) -> Iterator[dict]:
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

    Returns:
        This run's counts: ``frames`` (found in the inputs), ``resumed_skip`` (unchanged since
        their last line), ``scanned``, ``flagged`` and ``errors`` (lines written by this
        run), ``cells`` and ``main_model_cells`` (of this run's frames, those the main network
        scored: the cells a cascade's first stage passed, else all), ``seconds``,
        ``frames_per_second``; and what frames.jsonl now says about the
        frames of the inputs (their last lines): ``recorded``, of which ``unreadable``, of
        which ``unreadable_earlier`` (not written by this run), ``flagged_recorded``,
        ``cells_recorded`` and ``main_model_cells_recorded``.
        ``unreadable`` used to be this run's ``errors``; it now counts the whole output.
    """
    if overlays is True:
        overlays = "flagged"
    elif overlays is False:
        overlays = "none"
    if overlays not in OVERLAY_CHOICES:
        raise ScreenerError(
            f"invalid overlays {overlays!r}; choose one of: {', '.join(OVERLAY_CHOICES)}"
        )
    if engine not in ENGINES:
        raise ScreenerError(f"invalid engine {engine!r}; choose one of: {', '.join(ENGINES)}")
    if engine == "dask" and not scheduler:
        raise ScreenerError("the dask engine needs --scheduler ADDRESS (e.g. tcp://127.0.0.1:8786)")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    overlay_dir = out / "overlays" if overlays != "none" else None
    if overlay_dir:
        overlay_dir.mkdir(exist_ok=True)
    frames_path = out / FRAMES_FILE
    latest = read_latest(frames_path)
    frames = [p for p, _ in find_images(list(inputs))]
    screener = Screener(model)  # validates the model before any work starts
    todo = [p for p in frames if _needs_scan(p, latest.get(str(p)))]
    written: set[str] = set()
    counts = {
        "frames": len(frames),
        "resumed_skip": len(frames) - len(todo),
        "scanned": 0,
        "flagged": 0,
        "errors": 0,
        "cells": 0,
        "main_model_cells": 0,
    }
    t0 = time.perf_counter()
    with screener, frames_path.open("a", encoding="utf-8") as fh:

        def write(rec: dict) -> None:
            fh.write(json.dumps(rec) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
            latest[rec["frame"]] = _brief(rec)
            written.add(rec["frame"])
            counts["scanned"] += 1
            counts["flagged"] += bool(rec.get("flagged"))
            counts["errors"] += rec["status"] != "ok"
            counts["cells"] += rec.get("cells") or 0
            counts["main_model_cells"] += rec.get("main_model_cells") or 0
            if progress:
                progress(counts["resumed_skip"] + counts["scanned"], len(frames))

        if engine == "dask":
            results = _dask(model, todo, gsd_mm, overlays, overlay_dir, scheduler)
        elif workers <= 1:
            results = _local_pipelined(screener, todo, gsd_mm, overlays, overlay_dir)
        else:
            results = _local_pool(model, todo, gsd_mm, overlays, overlay_dir, workers)
        for rec in results:
            write(rec)
    seconds = time.perf_counter() - t0
    flagged = sorted(f for f, r in latest.items() if r["flagged"])
    atomic_write_text(out / FLAGGED_FILE, "".join(f"{f}\n" for f in flagged))
    counts["seconds"] = round(seconds, 3)
    counts["frames_per_second"] = round(counts["scanned"] / seconds, 3) if seconds > 0 else 0.0
    counts["frames_file"] = str(frames_path)
    counts["inputs"] = [str(p) for p in inputs]
    counts["notes"] = list(screener.notes)
    atomic_write_json(out / SCAN_FILE, _scan_record(Path(model), screener))
    counts.update(_recorded_counts(frames, latest, written))
    return counts
