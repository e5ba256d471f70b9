"""Batch pre-filter: run an exported screener over folders of frames and write one JSON line per frame.

``frames.jsonl`` is append-only: each finished frame is written as one line and
flushed to disk before the next starts, so stopping and restarting a scan loses
nothing; frames already in the file are skipped on restart, and a half-written
last line (the process was killed mid-write) is dropped and redone.
"""

from __future__ import annotations

import json
import multiprocessing
import os
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

from .imaging import PhotoError, list_images, read_rgb
from .screener import Screener

__all__ = ["scan_frames", "read_done", "FRAMES_FILE"]

FRAMES_FILE = "frames.jsonl"


def read_done(path: Path) -> set[str]:
    """Frames already recorded in a frames.jsonl; truncates a torn last line in place."""
    done: set[str] = set()
    if not path.exists():
        return done
    good_bytes = 0
    with path.open("rb") as fh:
        for raw in fh:
            if not raw.endswith(b"\n"):
                break
            try:
                rec = json.loads(raw)
            except json.JSONDecodeError:
                break
            done.add(rec["frame"])
            good_bytes += len(raw)
    if good_bytes != path.stat().st_size:
        with path.open("r+b") as fh:
            fh.truncate(good_bytes)
    return done


def _frame_record(
    screener: Screener, path: Path, *, gsd_mm: float | None, overlay_dir: Path | None
) -> dict:
    t0 = time.perf_counter()
    try:
        rgb = read_rgb(path)
    except PhotoError as exc:
        return {"frame": str(path), "status": "skipped", "error": str(exc)}
    cm = screener.crack_map(rgb, gsd_mm=gsd_mm)
    rec = {
        "frame": str(path),
        "status": "ok",
        "width": int(rgb.shape[1]),
        "height": int(rgb.shape[0]),
        "flagged": bool(cm.flagged.any()),
        "flagged_cells": int(cm.flagged.sum()),
        "cells": int(cm.flagged.size),
        "max_probability": round(float(cm.probabilities.max()), 4),
        "threshold": cm.threshold,
        "flagged_boxes": [
            {
                "box": [int(v) for v in cm.boxes[r, c]],
                "probability": round(float(cm.probabilities[r, c]), 4),
                "class": cm.class_names[int(cm.labels[r, c])],
            }
            for r, c in zip(*cm.flagged.nonzero(), strict=True)
        ],
        "seconds": round(time.perf_counter() - t0, 4),
    }
    if overlay_dir is not None and rec["flagged"]:
        name = f"{path.stem}-overlay.jpg"
        cm.overlay(rgb).save(overlay_dir / name, quality=88)
        rec["overlay"] = str(overlay_dir / name)
    return rec


_WORKER: Screener | None = None


def _init_worker(model: str, threads: int) -> None:
    global _WORKER
    _WORKER = Screener(model, threads=threads)


def _work(args: tuple[str, float | None, str | None]) -> dict:
    path, gsd, ov = args
    if _WORKER is None:  # pragma: no cover - the pool initializer always runs first
        raise RuntimeError("scan worker was not initialised")
    return _frame_record(_WORKER, Path(path), gsd_mm=gsd, overlay_dir=Path(ov) if ov else None)


def scan_frames(
    model: str | Path,
    inputs: list[Path],
    out_dir: str | Path,
    *,
    workers: int = 1,
    gsd_mm: float | None = None,
    overlays: bool = True,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """Scan frames into ``out_dir/frames.jsonl`` (and overlays of flagged frames).

    Args:
        model: the exported ONNX screener.
        inputs: image files and folders (folders are searched recursively).
        out_dir: output folder; an existing frames.jsonl is resumed.
        workers: local processes (1 = in this process, ONNX Runtime using all cores).
        gsd_mm: scale of the frames in mm per pixel, if known.
        overlays: write a JPEG overlay for each flagged frame.
        progress: called with (done, total) after each frame.

    Returns:
        Counts: frames total, newly scanned, skipped on resume, flagged, unreadable, seconds.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    overlay_dir = out / "overlays" if overlays else None
    if overlay_dir:
        overlay_dir.mkdir(exist_ok=True)
    frames_path = out / FRAMES_FILE
    done = read_done(frames_path)
    frames = list_images(inputs)
    todo = [p for p in frames if str(p) not in done]
    screener = Screener(model)  # validates the model before any work starts
    counts = {
        "frames": len(frames),
        "resumed_skip": len(frames) - len(todo),
        "scanned": 0,
        "flagged": 0,
        "unreadable": 0,
    }
    t0 = time.perf_counter()
    with frames_path.open("a", encoding="utf-8") as fh:

        def write(rec: dict) -> None:
            fh.write(json.dumps(rec) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
            counts["scanned"] += 1
            counts["flagged"] += bool(rec.get("flagged"))
            counts["unreadable"] += rec["status"] != "ok"
            if progress:
                progress(counts["resumed_skip"] + counts["scanned"], len(frames))

        if workers <= 1:
            for p in todo:
                write(_frame_record(screener, p, gsd_mm=gsd_mm, overlay_dir=overlay_dir))
        else:
            threads = max(1, (os.cpu_count() or 1) // workers)
            ctx = multiprocessing.get_context("forkserver")  # fork could deadlock on threads
            with ProcessPoolExecutor(
                workers, initializer=_init_worker, initargs=(str(model), threads), mp_context=ctx
            ) as pool:
                jobs = [(str(p), gsd_mm, str(overlay_dir) if overlay_dir else None) for p in todo]
                for rec in pool.map(_work, jobs, chunksize=4):
                    write(rec)
    counts["seconds"] = round(time.perf_counter() - t0, 3)
    counts["frames_file"] = str(frames_path)
    return counts
