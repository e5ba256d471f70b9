"""A job's acceptance sample: draw cells of a finished scan, store them as patches to label, list them.

``trainkit sample SCAN --workspace WS --cells N --seed S`` reads ``SCAN/frames.jsonl``
(each frame's cell grid and screening probabilities), draws N cells by stratified
random sampling over the screening probability (:mod:`trainkit.jobs.design`), crops
them from their frames into the workspace as unlabelled patches of the job's group
(``job:<name>``; they never join a split and come first in ``trainkit review``), and
writes ``SCAN/sample.csv``: one row per cell with the frame, its box, stratum and
inclusion probability, the patch id and an empty ``label`` column. Another labelling
tool or a script can fill that column and load it back with
``trainkit review WS --import-csv SCAN/sample.csv`` (keys: patch id, or photo and box).
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
from collections import defaultdict
from pathlib import Path

import numpy as np

from trainkit.core.decode import PhotoError, read_rgb
from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path
from trainkit.core.grid import crop, resize_patch
from trainkit.jobs.design import STRATA, draw_sample
from trainkit.labels.workspace import Workspace
from trainkit.screener.scan import FRAMES_FILE, SCAN_FILE

__all__ = [
    "SampleError",
    "ScanCells",
    "read_scan_cells",
    "sample_scan",
    "scan_model",
    "learned_frames",
    "SAMPLE_COLUMNS",
]


SAMPLE_FILE = "sample.csv"
SAMPLE_COLUMNS = (
    "patch_id", "photo", "x0", "y0", "x1", "y1", "frame", "stratum",
    "inclusion_probability", "screening_probability", "label",
)  # fmt: skip


class SampleError(TrainkitError):
    """A scan or workspace from which no sample can be drawn; the message says why."""


class ScanCells:
    """Every cell of a finished scan, flattened: frame, grid position, box and probability.

    Attributes:
        frames: one dict per scanned frame (its last ok line in frames.jsonl).
        frame_index, row, col: (n,) position of each cell.
        boxes: (n, 4) x0, y0, x1, y1 in frame pixels.
        probabilities: (n,) screening probability of each cell.
        threshold: the model's screening threshold at the scan.
    """

    def __init__(self, frames: list[dict], threshold: float) -> None:
        self.frames = frames
        self.threshold = threshold
        fi, rows, cols, boxes, probs = [], [], [], [], []
        for k, f in enumerate(frames):
            p = np.asarray(f["cell_probabilities"], dtype=np.float64)
            xs, ys = np.asarray(f["grid"]["x"]), np.asarray(f["grid"]["y"])
            r, c = np.meshgrid(np.arange(p.shape[0]), np.arange(p.shape[1]), indexing="ij")
            fi.append(np.full(p.size, k))
            rows.append(r.ravel())
            cols.append(c.ravel())
            boxes.append(np.column_stack([xs[c.ravel(), 0], ys[r.ravel(), 0],
                                          xs[c.ravel(), 1], ys[r.ravel(), 1]]))  # fmt: skip
            probs.append(p.ravel())
        self.frame_index = np.concatenate(fi) if fi else np.zeros(0, np.int64)
        self.row = np.concatenate(rows) if rows else np.zeros(0, np.int64)
        self.col = np.concatenate(cols) if cols else np.zeros(0, np.int64)
        self.boxes = np.concatenate(boxes) if boxes else np.zeros((0, 4), np.int64)
        self.probabilities = np.concatenate(probs) if probs else np.zeros(0)

    def __len__(self) -> int:
        return int(self.probabilities.size)


def read_scan_cells(scan_dir: str | Path) -> ScanCells:
    """The cells of every frame whose last line in ``SCAN/frames.jsonl`` is a finished scan.

    Raises:
        SampleError: no frames.jsonl, no usable frame, frames scanned without per-cell
            probabilities (an older kit), or frames scanned at different thresholds.
    """
    path = Path(scan_dir) / FRAMES_FILE
    if not path.is_file():
        raise SampleError(f"{path} does not exist; run `trainkit scan ... --out {scan_dir}` first")
    latest: dict[str, dict] = {}
    with path.open(encoding="utf-8") as fh:
        for line in fh:
            try:
                rec = json.loads(line)
            except json.JSONDecodeError:
                continue  # a torn last line: the scan was stopped mid-write
            latest[rec["frame"]] = rec
    frames = [r for r in latest.values() if r.get("status") == "ok"]
    if not frames:
        raise SampleError(f"{path} records no frame that was scanned successfully")
    old = [r["frame"] for r in frames if "cell_probabilities" not in r]
    if old:
        raise SampleError(
            f"{len(old)} frames of {path} were scanned without per-cell probabilities "
            f"(e.g. {old[0]}): scan them again with this version of trainkit"
        )
    thresholds = sorted({float(r["threshold"]) for r in frames})
    if len(thresholds) > 1:
        raise SampleError(
            f"{path} mixes frames scanned at thresholds {thresholds}: one sample needs one "
            "model; scan into separate folders"
        )
    return ScanCells(sorted(frames, key=lambda r: r["frame"]), thresholds[0])


def scan_model(scan_dir: str | Path) -> dict | None:
    """What ``SCAN/scan.json`` says of the model that made the scan (None for older scans)."""
    path = Path(scan_dir) / SCAN_FILE
    return json.loads(path.read_text(encoding="utf-8")) if path.is_file() else None


def learned_frames(scan_record: dict | None) -> dict[str, str]:
    """SHA-256 -> path of the job frames the scan's model learned from (``trainkit train
    --from``), as the scan recorded them (``scan_record``, from :func:`scan_model`), else as
    the model's experiment folder says now."""
    rec = scan_record or {}
    if isinstance(rec.get("learned_frames"), dict):
        return rec["learned_frames"]
    return Experiment(Path(rec["model"]).parent).learned_frames() if rec.get("model") else {}


def sample_scan(
    scan_dir: str | Path,
    workspace: Workspace,
    *,
    cells: int,
    seed: int,
    job: str | None = None,
    near_fraction: float = 0.2,
) -> dict:
    """Draw a job's acceptance sample from a finished scan into a workspace.

    Args:
        scan_dir: the scan's output folder (holding frames.jsonl).
        workspace: where the sampled cells become unlabelled patches.
        cells: how many cells to draw.
        seed: the sample's seed (same scan, cells and seed: same sample).
        job: the job's name (default: the scan folder's name).
        near_fraction: the ``near`` stratum is ``[threshold * near_fraction, threshold)``.

    Returns:
        A summary: job, cells drawn, strata table, frames touched, sample.csv path.

    Raises:
        SampleError: the scan cannot be sampled, or a frame changed since it was scanned.
    """
    scan_dir = Path(scan_dir)
    job = job or scan_dir.resolve().name
    if any(j["name"] == job for j in workspace.jobs()):
        raise SampleError(
            f"workspace {workspace.root} already holds job {job!r}; pass another --job name"
        )
    table = read_scan_cells(scan_dir)
    learned = learned_frames(scan_model(scan_dir))
    kept = [f for f in table.frames if f.get("sha256") not in learned]
    left_out = len(table.frames) - len(kept)
    if left_out:
        if not kept:
            raise SampleError(
                f"every frame of {scan_dir} is one the scan's model learned from (trainkit "
                "train --from): an estimate on them would flatter it; scan other frames of the job"
            )
        table = ScanCells(kept, table.threshold)
    if not 1 <= cells <= len(table):
        raise SampleError(
            f"--cells must be between 1 and {len(table)} (the scan's cells), got {cells}"
        )
    design = draw_sample(
        table.probabilities, table.threshold, cells, seed=seed, near_fraction=near_fraction
    )
    by_frame: dict[int, list[int]] = defaultdict(list)
    for k, i in enumerate(design.index):
        by_frame[int(table.frame_index[i])].append(k)
    root = os.path.commonpath([str(Path(f["frame"]).parent) for f in table.frames])
    rows, job_cells = [], []
    for fk, ks in sorted(by_frame.items()):
        frame = table.frames[fk]
        name = f"{job}/{Path(os.path.relpath(frame['frame'], root)).as_posix()}"
        ids = _add_frame(workspace, frame, name, job, [int(design.index[k]) for k in ks], table)
        for k, pid in zip(ks, ids, strict=True):
            i = int(design.index[k])
            cell = {
                "patch_id": pid,
                "frame": frame["frame"],
                "stratum": STRATA[int(design.stratum[k])],
                "inclusion_probability": float(design.inclusion_probability[k]),
                "screening_probability": float(table.probabilities[i]),
            }
            job_cells.append(cell)
            rows.append({"photo": name, **dict(zip(("x0", "y0", "x1", "y1"),
                                                   map(int, table.boxes[i]), strict=True)), **cell})  # fmt: skip
    summary_design = {
        **design.to_dict(),
        "frames": len(table.frames),
        "cells_in_scan": len(table),
        "near_fraction": near_fraction,
        "frames_learned_from_left_out": left_out,
    }
    summary_design.pop("cells")
    workspace.add_job(
        job, scan=str(scan_dir.resolve()), threshold=table.threshold, design=summary_design,
        cells=job_cells,
    )  # fmt: skip
    out = scan_dir / SAMPLE_FILE
    _write_sample_csv(out, rows)
    return {
        "job": job,
        "cells": len(rows),
        "frames_sampled": len(by_frame),
        "frames_in_scan": len(table.frames),
        "frames_learned_from_left_out": left_out,
        "cells_in_scan": len(table),
        "threshold": table.threshold,
        "strata": design.strata_table(),
        "sample_csv": str(out),
        "seed": seed,
    }


def _add_frame(
    ws: Workspace, frame: dict, name: str, job: str, cells: list[int], table: ScanCells
) -> list[int]:
    """Crop the sampled cells of one frame into the workspace; returns their patch ids."""
    from trainkit.intake.quality import quality_measures

    path = Path(frame["frame"])
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise SampleError(
            f"frame {path} cannot be read ({exc}); it moved since the scan?"
        ) from None
    digest = hashlib.sha256(data).hexdigest()
    if digest != frame.get("sha256"):
        raise SampleError(
            f"frame {path} changed since it was scanned (content hash differs): scan again"
        )
    try:
        rgb = read_rgb(path, data=data)
    except PhotoError as exc:
        raise SampleError(str(exc)) from None
    rel_dir = f"patches/job-{digest[:16]}"
    (ws.root / rel_dir).mkdir(parents=True, exist_ok=True)
    patches = []
    for i in cells:
        x0, y0, x1, y1 = (int(v) for v in table.boxes[i])
        side = max(x1 - x0, y1 - y0)
        patch = resize_patch(crop(rgb, (x0, y0, x1, y1), side), ws.tile_px)
        rel = f"{rel_dir}/r{int(table.row[i]):03d}_c{int(table.col[i]):03d}.tiff"
        from PIL import Image

        with atomic_path(ws.root / rel) as tmp:
            Image.fromarray(patch).save(tmp, format="TIFF")
        q = quality_measures(patch)
        patches.append(
            {
                "row": int(table.row[i]),
                "col": int(table.col[i]),
                "x0": x0,
                "y0": y0,
                "x1": x1,
                "y1": y1,
                "crop": rel,
                "patch_mm": None,
                **q,
            }  # fmt: skip
        )
    ws.add_photo_with_patches(
        name=name, source_path=str(path.resolve()), width=int(frame["width"]),
        height=int(frame["height"]), gsd_mm=None, group_id=f"job:{job}", sha256=digest,
        patches=patches, size_bytes=len(data),
    )  # fmt: skip
    lookup = ws.patch_lookup()
    return [lookup[(name, (p["x0"], p["y0"], p["x1"], p["y1"]))] for p in patches]


def _write_sample_csv(path: Path, rows: list[dict]) -> None:
    with atomic_path(path) as tmp, tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=SAMPLE_COLUMNS, extrasaction="ignore")
        w.writeheader()
        for r in sorted(rows, key=lambda r: r["patch_id"]):
            w.writerow({**r, "label": ""})
