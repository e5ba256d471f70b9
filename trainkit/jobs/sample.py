"""A job's acceptance sample: draw cells of a finished scan, store them as patches to label, list them.

``trainkit sample SCAN --workspace WS --cells N --seed S [--job NAME]`` reads
``SCAN/frames.jsonl`` (each frame's cell grid and screening probabilities), draws N cells
by stratified random sampling over the screening probability (:mod:`trainkit.jobs.design`),
crops them from their frames into the workspace as unlabelled patches of the job's group
(``job:<name>``; they never join a split and come first in ``trainkit review``), and
writes ``SCAN/jobs/<name>/sample.csv`` (:class:`~trainkit.jobs.files.JobFiles`): one row
per cell with the frame, its box, stratum and inclusion probability, the patch id and a
``label`` column. Another labelling tool or a script can fill that column and load it
back with ``trainkit review WS --import-csv SCAN/jobs/<name>/sample.csv``.

``--more N`` (``more=N``) adds N cells to the job's sample: drawn without replacement
from the cells not drawn yet, within the strata stored with the first draw, so the
whole is one stratified sample (:func:`trainkit.jobs.design.draw_more`) and
``trainkit verify`` counts every answered cell.

Nothing is half-done or lost: the crops are written first (named by frame, box, patch
size and pixel digest, so a file name always means the same pixels and no crop is ever
written over), then the job's record, frames, patches and cells are written in one
database transaction, with ``sample.csv`` written just before it commits. A
``sample.csv`` holding typed answers is never replaced (``--more`` carries the answers
over) unless ``discard_typed_answers`` is given.
"""

from __future__ import annotations

import csv
import datetime as _dt
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
from trainkit.core.textsafe import csv_cell, csv_uncell, token_problem
from trainkit.jobs.design import STRATA, JobSample, assign_strata, draw_more, draw_sample
from trainkit.jobs.files import SAMPLE_FILE, JobFiles
from trainkit.screener.scan import FRAMES_FILE, SCAN_FILE, frame_path
from trainkit.store.workspace import Workspace

__all__ = [
    "SampleError",
    "ScanCells",
    "read_scan_cells",
    "sample_scan",
    "scan_model",
    "learned_frames",
    "check_job_name",
    "SAMPLE_COLUMNS",
    "SAMPLE_FILE",
]


SAMPLE_COLUMNS = (
    "patch_id", "photo", "x0", "y0", "x1", "y1", "frame", "stratum",
    "inclusion_probability", "screening_probability", "label",
)  # fmt: skip
#: Columns of sample.csv holding text (written through :func:`csv_cell`); the rest are numbers.
_TEXT_COLUMNS = ("photo", "frame", "stratum", "label")
_BOX = ("x0", "y0", "x1", "y1")


class SampleError(TrainkitError):
    """A scan or workspace from which no sample can be drawn; the message says why."""


def check_job_name(name: object, *, error: type[ValueError] | None = None) -> str:
    """Return ``name`` if it is a valid job name (:func:`token_problem`), else raise
    ``error`` (default :class:`SampleError`) naming it and the rule."""
    problem = token_problem(name)
    if problem:
        raise (error or SampleError)(f"job name {name!r} cannot be used: {problem}")
    return name  # type: ignore[return-value]


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
    absolute: dict[str, str] = {}
    with path.open(encoding="utf-8") as fh:
        for line in fh:
            try:
                rec = json.loads(line)
            except json.JSONDecodeError:
                continue  # a torn last line: the scan was stopped mid-write
            # Absolute paths (an older scan's relative ones resolved by the scan's own rule):
            # the sample finds the files from any folder and names each frame one way.
            if rec["frame"] not in absolute:
                absolute[rec["frame"]] = str(frame_path(scan_dir, rec["frame"]))
            rec["frame"] = absolute[rec["frame"]]
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
    cells: int | None = None,
    seed: int,
    job: str | None = None,
    near_fraction: float = 0.2,
    more: int | None = None,
    discard_typed_answers: bool = False,
) -> dict:
    """Draw a job's acceptance sample from a finished scan into a workspace, or add to it.

    Args:
        scan_dir: the scan's output folder (holding frames.jsonl).
        workspace: where the sampled cells become unlabelled patches.
        cells: how many cells to draw for a new job.
        seed: the draw's seed (same scan, cells and seed: same sample).
        job: the job's name (default: the scan folder's name); a short token
            (:func:`trainkit.core.textsafe.token_problem`).
        near_fraction: the ``near`` stratum is ``[threshold * near_fraction, threshold)``.
        more: instead of ``cells``: add this many cells to the existing job's sample.
        discard_typed_answers: write ``sample.csv`` even where the existing one holds
            answers that the new one would not carry over.

    Returns:
        A summary: job, cells drawn now and in the job, strata table, frames touched,
        the sample.csv path and what happened to an earlier one.

    Raises:
        SampleError: the scan cannot be sampled, a frame changed since it was scanned, the
            job exists (or, with ``more``, does not), or typed answers would be lost.
    """
    scan_dir = Path(scan_dir)
    if (cells is None) == (more is None):
        raise SampleError("give either the cells of a new sample or --more N, not both")
    defaulted = job is None
    job = job or scan_dir.resolve().name
    if defaulted and token_problem(job):
        raise SampleError(
            f"the scan folder's name {job!r} cannot be a job name ({token_problem(job)}): "
            "pass --job NAME"
        )
    check_job_name(job)
    jobs = {j["name"]: j for j in workspace.jobs()}
    files = JobFiles(scan_dir, job)
    table = read_scan_cells(scan_dir)
    learned = learned_frames(scan_model(scan_dir))
    kept = [f for f in table.frames if f.get("sha256") not in learned]
    left_out = len(table.frames) - len(kept)
    if left_out:
        if not kept:
            raise SampleError(
                f"every frame of {scan_dir} ({left_out}) is one the scan's model learned from "
                "(trainkit train --from): an estimate on them would flatter it; scan other "
                "frames of the job"
            )
        table = ScanCells(kept, table.threshold)
    if cells is not None:  # a new sample (exactly one of cells and more was given)
        if job in jobs:
            done = workspace.job_cells(job)
            raise SampleError(
                f"workspace {workspace.root} already holds job {job!r} ({len(done)} cells, "
                f"{sum(c['label'] is not None for c in done)} answered): add cells to it with "
                "--more N, or pass another --job name for a new check"
            )
        _check_wanted(
            cells, "--cells", len(table), scan_dir, left_out, len(table.frames) + left_out
        )
        design = draw_sample(
            table.probabilities, table.threshold, cells, seed=seed, near_fraction=near_fraction
        )
        earlier: list[dict] = []
        stored = {
            **{k: v for k, v in design.to_dict().items() if k != "cells"},
            "frames": len(table.frames),
            "cells_in_scan": len(table),
            "near_fraction": near_fraction,
            "frames_learned_from_left_out": left_out,
            "draws": [],
        }
    elif more is not None:
        if job not in jobs:
            raise SampleError(
                f"workspace {workspace.root} holds no job {job!r} to add cells to; its jobs: "
                f"{', '.join(jobs) or 'none'}"
            )
        earlier = workspace.job_cells(job)
        design, stored = _draw_more(jobs[job], earlier, table, scan_dir, more, seed, left_out)
    # 1. Crops, frame by frame (files only: a crop's name always means its pixels).
    by_frame: dict[int, list[int]] = defaultdict(list)
    for k, i in enumerate(design.index):
        by_frame[int(table.frame_index[i])].append(k)
    root = os.path.commonpath([str(Path(f["frame"]).parent) for f in table.frames])
    frames, new_cells = [], []
    for fk, ks in sorted(by_frame.items()):
        frame = table.frames[fk]
        name = f"{job}/{Path(os.path.relpath(frame['frame'], root)).as_posix()}"
        frames.append(
            _crop_frame(workspace, frame, name, [int(design.index[k]) for k in ks], table)
        )
        for k in ks:
            i = int(design.index[k])
            new_cells.append({
                "photo": name,
                "box": tuple(int(v) for v in table.boxes[i]),
                "frame": frame["frame"],
                "stratum": STRATA[int(design.stratum[k])],
                "inclusion_probability": float(design.inclusion_probability[k]),
                "screening_probability": float(table.probabilities[i]),
            })  # fmt: skip
    # 2. sample.csv: which typed answers it holds now and which the new one keeps.
    inclusion = design_inclusion(design)
    rows = [
        {"patch_id": c["patch_id"], "photo": c["photo"], **dict(zip(_BOX, c["box"], strict=True)),
         "frame": c["frame"], "stratum": c["stratum"],
         "inclusion_probability": float(inclusion[c["stratum"]]),
         "screening_probability": c["screening_probability"]}
        for c in earlier
    ]  # fmt: skip
    planned = {(r["photo"], tuple(r[k] for k in _BOX)) for r in rows} | {
        (c["photo"], c["box"]) for c in new_cells
    }
    typed, note = _typed_answers(files, planned, more is not None, discard_typed_answers)
    # 3. One transaction: the job, its frames, patches and cells; sample.csv just before commit.
    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    stored["draws"] = [*stored.get("draws", []), {"seed": seed, "cells": len(new_cells), "at": now}]
    stored["inclusion"] = inclusion

    def write_csv(ids: list[int]) -> None:
        for c, pid in zip(new_cells, ids, strict=True):
            rows.append({"patch_id": pid, "photo": c["photo"],
                         **dict(zip(_BOX, c["box"], strict=True)), **c})  # fmt: skip
        for r in rows:
            r["label"] = typed.get((r["photo"], tuple(r[k] for k in _BOX)), "")
        files.folder.mkdir(parents=True, exist_ok=True)
        _write_sample_csv(files.sample_csv, rows)

    workspace.add_job_sample(
        job, scan=str(scan_dir.resolve()), threshold=table.threshold, design=stored,
        frames=frames, cells=new_cells, more=more is not None, before_commit=write_csv,
    )  # fmt: skip
    return {
        "job": job,
        "cells": len(new_cells),
        "cells_in_job": len(rows),
        "added": more is not None,
        "frames_sampled": len(by_frame),
        "frames_in_scan": len(table.frames) + left_out,
        "frames_learned_from_left_out": left_out,
        "cells_in_scan": len(table),
        "threshold": table.threshold,
        "strata": design.strata_table(),
        "sample_csv": str(files.sample_csv),
        "sample_csv_note": note,
        "answers_carried_over": sum(1 for r in rows if r["label"]),
        "seed": seed,
    }


def design_inclusion(design: JobSample) -> dict[str, float]:
    """Stratum name -> inclusion probability ``n_h / N_h`` of a design (every draw counted)."""
    return {s["stratum"]: s["inclusion_probability"] for s in design.strata_table()}


def _check_wanted(n: int, option: str, room: int, scan_dir: Path, left_out: int, frames: int,
                  *, drawn: int = 0) -> None:  # fmt: skip
    """Refuse a number of cells the scan cannot give, saying why it has that many."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise SampleError(f"{option} must be a whole number of cells of at least 1, got {n!r}")
    if n <= room:
        return
    why = f"the {room} cells of the {frames - left_out} frames of {scan_dir} that can be sampled"
    if drawn:
        why = f"the {room} cells of {scan_dir} not drawn yet ({drawn} were drawn before)"
    text = f"{option} {n} is more than {why}"
    if left_out:
        text += (
            f"; {left_out} of the scan's {frames} frames were left out because the scan's model "
            "learned from them (trainkit train --from), so they cannot check it: scan other "
            "frames of the job that the model has not seen"
        )
    raise SampleError(text + f"; ask for at most {room}" if room else text)


def _draw_more(
    record: dict, earlier: list[dict], table: ScanCells, scan_dir: Path, n: int, seed: int,
    left_out: int,
) -> tuple[JobSample, dict]:  # fmt: skip
    """The further draw of a job's sample and its updated design record."""
    job, d = record["name"], dict(record["design"])
    if record["scan"] != str(scan_dir.resolve()):
        raise SampleError(
            f"job {job!r} was sampled from {record['scan']}, not {scan_dir.resolve()}: add to it "
            "from the same scan, or start a new check with another --job name"
        )
    edges = tuple(d.get("rest_edges") or ())
    near = float(d.get("near_fraction", 0.2))
    codes = assign_strata(
        table.probabilities, table.threshold, near_fraction=near, rest_edges=edges
    )
    now = {STRATA[h]: int(v) for h, v in enumerate(np.bincount(codes, minlength=len(STRATA)))}
    then = {s["stratum"]: int(s["cells"]) for s in d.get("strata", [])}
    where = {(str(frame_path(scan_dir, c["frame"])), tuple(c["box"])): c for c in earlier}
    index = {
        (table.frames[int(f)]["frame"], tuple(int(v) for v in b)): i
        for i, (f, b) in enumerate(zip(table.frame_index, table.boxes, strict=True))
    }
    missing = [k for k in where if k not in index]
    changed = float(record["threshold"]) != float(table.threshold) or any(
        now.get(s, 0) != v for s, v in then.items()
    )
    if changed or missing or sum(then.values()) != len(table):
        raise SampleError(
            f"the scan {scan_dir} is not the one job {job!r} was drawn from ({sum(then.values())} "
            f"cells at threshold {record['threshold']:g} then, {len(table)} at "
            f"{table.threshold:g} now): more cells would not belong to the same sample; a new "
            "sample starts a new check (pass another --job name)"
        )
    sampled = np.zeros(len(table), dtype=bool)
    sampled[[index[k] for k in where]] = True
    _check_wanted(n, "--more", int((~sampled).sum()), scan_dir, left_out,
                  len(table.frames) + left_out, drawn=int(sampled.sum()))  # fmt: skip
    design = draw_more(
        table.probabilities, table.threshold, n, seed=seed, sampled=sampled,
        near_fraction=near, rest_edges=edges,
    )  # fmt: skip
    d["strata"] = design.strata_table()
    if "draws" not in d:  # sampled by a kit that kept no list of draws
        d["draws"] = [{"seed": d.get("seed"), "cells": len(earlier), "at": None}]
    return design, d


def _typed_answers(
    files: JobFiles, planned: set, adding: bool, discard: bool
) -> tuple[dict, str | None]:
    """Answers typed into the job's sample.csv (and, for a job sampled by an older kit, into
    ``SCAN/sample.csv``) that the new file keeps, keyed by (photo, box); and a note of what
    happens to the existing file. Refuses when answers would be lost, unless ``discard``."""
    typed: dict = {}
    note = None
    sources = (files.sample_csv, files.legacy_sample_csv) if adding else (files.sample_csv,)
    for path in sources:
        if not path.is_file():
            continue
        legacy = path != files.sample_csv
        try:
            answers, n_rows = _read_answers(path)
        except (OSError, UnicodeDecodeError, csv.Error, KeyError, ValueError) as exc:
            if legacy:
                continue
            if not discard:
                raise SampleError(
                    f"{path} exists and cannot be read as a sample ({exc}); move it away, or "
                    "pass --discard-typed-answers to write over it"
                ) from None
            note = f"replaced {path} (unreadable)"
            continue
        mine = {k: v for k, v in answers.items() if k in planned}
        if legacy:  # SCAN/sample.csv of an older kit: only rows of this job's cells count
            typed = {**mine, **typed}
            continue
        lost = len(answers) - (len(mine) if adding else 0)
        if lost and not discard:
            what = "answers of cells not in this sample" if adding else "typed answers"
            raise SampleError(
                f"{path} exists with {lost} {what} ({n_rows} rows): an earlier sample of job "
                f"{files.job!r}, perhaps in another workspace. Import them first (trainkit "
                "review WS --import-csv), pass another --job name, or pass "
                "--discard-typed-answers to write over it"
            )
        if adding:
            typed.update(mine)
            note = f"kept the {len(mine)} answers typed into {path}" if mine else None
        else:
            note = f"replaced {path} ({n_rows} rows, {'none' if not lost else lost} answered)"
            if lost:
                note += " as asked (--discard-typed-answers)"
    return typed, note


def _read_answers(path: Path) -> tuple[dict, int]:
    """(photo, box) -> typed label of the answered rows of a sample.csv, and its row count."""
    with path.open(newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        missing = {"photo", *_BOX, "label"} - set(reader.fieldnames or [])
        if missing:
            raise ValueError(f"no column {sorted(missing)[0]!r}")
        answers, n = {}, 0
        for row in reader:
            n += 1
            label = csv_uncell((row.get("label") or "").strip())
            if label:
                box = tuple(int(row[k]) for k in _BOX)
                answers[(csv_uncell(row["photo"] or ""), box)] = label
    return answers, n


def _crop_frame(ws: Workspace, frame: dict, name: str, cells: list[int], table: ScanCells) -> dict:
    """Crop the sampled cells of one frame into the workspace's crop files; returns the
    frame as :meth:`Workspace.add_job_sample` takes it."""
    from PIL import Image

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
        rel = crop_name(rel_dir, (x0, y0, x1, y1), patch)
        target = ws.root / rel
        if target.exists():
            _check_same_pixels(target, patch)
        else:
            with atomic_path(target) as tmp:
                Image.fromarray(patch).save(tmp, format="TIFF")
        q = quality_measures(patch)
        patches.append(
            {"row": int(table.row[i]), "col": int(table.col[i]), "x0": x0, "y0": y0, "x1": x1,
             "y1": y1, "crop": rel, "patch_mm": None, **q}
        )  # fmt: skip
    return {
        "name": name, "source_path": str(path.resolve()), "width": int(frame["width"]),
        "height": int(frame["height"]), "sha256": digest, "size_bytes": len(data),
        "patches": patches,
    }  # fmt: skip


def crop_name(folder: str, box: tuple[int, int, int, int], patch: np.ndarray) -> str:
    """A job crop's file name: its box in the frame, its size and a digest of its pixels,
    so that one name never stands for two crops (versions before named crops by grid
    position alone, and two scans with other grids of one frame overwrote each other's)."""
    pixels = hashlib.sha256(np.ascontiguousarray(patch).tobytes() + str(patch.shape).encode())
    x0, y0, x1, y1 = box
    return f"{folder}/x{x0}_y{y0}_x{x1}_y{y1}_p{patch.shape[0]}_{pixels.hexdigest()[:12]}.tiff"


def _check_same_pixels(path: Path, patch: np.ndarray) -> None:
    """Refuse to go on when an existing crop of this name holds other pixels."""
    from PIL import Image

    try:
        with Image.open(path) as im:
            same = np.array_equal(np.asarray(im.convert("RGB")), patch)
    except (OSError, ValueError):
        same = False
    if not same:
        raise SampleError(
            f"crop {path} exists with other pixels than the cell it is named for; the "
            "workspace's crops were changed outside trainkit. Nothing was written over it"
        )


def _write_sample_csv(path: Path, rows: list[dict]) -> None:
    with atomic_path(path) as tmp, tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=SAMPLE_COLUMNS, extrasaction="ignore")
        w.writeheader()
        for r in sorted(rows, key=lambda r: r["patch_id"]):
            w.writerow({k: csv_cell(r[k]) if k in _TEXT_COLUMNS else r[k] for k in SAMPLE_COLUMNS})
