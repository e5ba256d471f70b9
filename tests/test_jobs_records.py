"""The job commands never corrupt or erase what a person answered.

Crops are never written over, a second sample never erases the first one's sample.csv or
verification, a sample is all or nothing (even under ``kill -9``), job cells never enter
a split, every check of a job is kept, records are written only once everything they
depend on has loaded, a sample can grow without redrawing a cell, names and CSV cells
from users cannot inject anything. The frames and the screener are those of
test_jobs_workflow (a brightness model, cells with a known truth).
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from test_jobs_workflow import answer_from_truth, make_job, new_ws, scanned  # noqa: F401
from test_screener import S, brightness_model

from trainkit.core.grid import crop, resize_patch
from trainkit.jobs.sample import SampleError, sample_scan
from trainkit.jobs.verify import VerifyError, verdict_line, verify_scan
from trainkit.labels.labels_io import import_csv
from trainkit.labels.splits import split_workspace
from trainkit.screener.scan import scan_frames
from trainkit.store.workspace import WorkspaceError

REPO = Path(__file__).resolve().parents[1]


def _rows(path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _fill(path, truth, *, keep_empty=0) -> None:
    """Type the truth into a sample.csv's label column (as a spreadsheet user would)."""
    rows = _rows(path)
    for r in rows[keep_empty:]:
        box = tuple(int(r[k]) for k in ("x0", "y0", "x1", "y1"))
        r["label"] = "crack" if truth[(r["frame"].rsplit("/", 1)[1], box)] else "none"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


# ----- 1. crops: one name never stands for two boxes ---------------------------------------


def test_a_second_grid_of_the_same_frame_never_overwrites_a_crop(tmp_path):
    """Two scans of one frame with other grids (32-px and 24-px cells): every cell of both
    samples keeps its own crop, whose pixels are its own box of the frame."""
    frames = tmp_path / "frames"
    frames.mkdir()
    rgb = np.random.default_rng(0).integers(0, 256, (4 * S, 4 * S, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(frames / "f.png")  # noise: every box has its own pixels
    scan_frames(brightness_model(tmp_path / "m32.onnx"), [frames], tmp_path / "s32")
    scan_frames(brightness_model(tmp_path / "m24.onnx", patch_px=24), [frames], tmp_path / "s24")
    ws = new_ws(tmp_path / "ws")
    sample_scan(tmp_path / "s32", ws, cells=16, seed=0, job="a")  # every 32-px cell
    before = {r.id: (ws.root / r.crop).read_bytes() for r in ws.patches()}
    sample_scan(tmp_path / "s24", ws, cells=36, seed=0, job="b")  # every 24-px cell
    for pid, data in before.items():
        rec = next(r for r in ws.patches() if r.id == pid)
        assert (ws.root / rec.crop).read_bytes() == data, rec
    recs = ws.patches()
    assert len(recs) == 16 + 36 and len({r.crop for r in recs}) == 52
    for r in recs:  # each crop holds its own box, resized to the workspace's patch size
        side = max(r.box[2] - r.box[0], r.box[3] - r.box[1])
        want = resize_patch(crop(rgb, r.box, side), S)
        assert np.array_equal(np.asarray(Image.open(ws.root / r.crop).convert("RGB")), want)


def test_an_existing_crop_with_other_pixels_is_never_written_over(tmp_path):
    frames = tmp_path / "frames"
    frames.mkdir()
    rgb = np.random.default_rng(1).integers(0, 256, (2 * S, 2 * S, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(frames / "f.png")
    scan_frames(brightness_model(tmp_path / "m.onnx"), [frames], tmp_path / "scan")
    ws = new_ws(tmp_path / "ws")
    sample_scan(tmp_path / "scan", ws, cells=4, seed=0, job="a")
    target = ws.root / ws.patches()[0].crop
    Image.fromarray(np.zeros((S, S, 3), np.uint8)).save(target, format="TIFF")
    tampered = target.read_bytes()
    with pytest.raises(SampleError, match="exists with other pixels"):
        sample_scan(tmp_path / "scan", ws, cells=4, seed=0, job="b")
    assert target.read_bytes() == tampered
    assert [j["name"] for j in ws.jobs()] == ["a"]  # and nothing of job b was recorded


# ----- 2. a job's files are the job's -----------------------------------------------------


def test_a_second_sample_keeps_the_first_ones_answers_and_verification(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    a = sample_scan(out, ws, cells=40, seed=1, job="a")
    _fill(a["sample_csv"], truth)
    b = sample_scan(out, ws, cells=30, seed=2, job="b")
    rows = _rows(a["sample_csv"])
    assert len(rows) == 40 and all(r["label"] in ("crack", "none") for r in rows)
    assert Path(b["sample_csv"]) != Path(a["sample_csv"])
    import_csv(ws, a["sample_csv"], reviewer="sheet")
    answer_from_truth(ws, truth)
    va = verify_scan(out, ws, job="a")
    vb = verify_scan(out, ws, job="b")
    pages = {json.loads(p.read_text())["job"]: p for p in out.rglob("verification.json")}
    assert set(pages) == {"a", "b"}
    assert json.loads(pages["a"].read_text())["estimate"] == va["estimate"]
    assert json.loads(pages["b"].read_text())["estimate"] == vb["estimate"]
    # Job a again, in another workspace: its typed answers are never replaced unasked.
    other = new_ws(tmp_path / "other")
    with pytest.raises(SampleError, match="exists with 40 typed answers"):
        sample_scan(out, other, cells=10, seed=3, job="a")
    assert len(_rows(a["sample_csv"])) == 40 and not other.jobs()
    again = sample_scan(out, other, cells=10, seed=3, job="a", discard_typed_answers=True)
    assert "40 answered" in again["sample_csv_note"] and len(_rows(again["sample_csv"])) == 10


def test_an_unanswered_sample_csv_is_replaced_and_the_message_says_so(scanned, tmp_path):  # noqa: F811
    out, _ = scanned
    first = sample_scan(out, new_ws(tmp_path / "a"), cells=20, seed=1, job="j")
    assert first["sample_csv_note"] is None
    second = sample_scan(out, new_ws(tmp_path / "b"), cells=10, seed=1, job="j")
    assert second["sample_csv_note"] == f"replaced {first['sample_csv']} (20 rows, none answered)"


# ----- 3. one transaction; job cells never in a split --------------------------------------

_KILLER = """
import os, signal, sys
from trainkit.store.workspace import Workspace
point, scan, ws = sys.argv[1:4]
if point == "crops":  # after a few crops, before any database write
    import trainkit.intake.quality as q
    real, seen = q.quality_measures, [0]
    def quality_measures(patch):
        seen[0] += 1
        if seen[0] == 25:
            os.kill(os.getpid(), signal.SIGKILL)
        return real(patch)
    q.quality_measures = quality_measures
else:  # inside the database writes: at the first job cell
    real_connect = Workspace.connect
    from contextlib import contextmanager
    @contextmanager
    def connect(self):
        with real_connect(self) as con:
            def trace(sql):
                if "INSERT INTO job_cells" in sql:
                    os.kill(os.getpid(), signal.SIGKILL)
            con.set_trace_callback(trace)
            yield con
    Workspace.connect = connect
from trainkit.jobs.sample import sample_scan
sample_scan(scan, Workspace.open(ws), cells=60, seed=1, job="deck")
"""


@pytest.mark.parametrize("point", ["crops", "job_cells"])
def test_kill_9_during_sample_leaves_nothing_and_a_rerun_works(scanned, tmp_path, point):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    env = {**os.environ, "PYTHONPATH": str(REPO), "OMP_NUM_THREADS": "1"}
    proc = subprocess.run(
        [sys.executable, "-c", textwrap.dedent(_KILLER), point, str(out), str(ws.root)],
        env=env, capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert ws.photos() == [] and ws.patches() == [] and ws.jobs() == []
    s = sample_scan(out, ws, cells=60, seed=1, job="deck")
    assert s["cells"] == 60 and len(ws.job_cells("deck")) == 60
    answer_from_truth(ws, truth)
    assert verify_scan(out, ws, job="deck")["cells_answered"] == 60


def _ordinary_photos(ws, n=12):
    names = ["none", "crack", "none", "crack"]
    for i in range(n):
        ws.add_photo_with_patches(
            name=f"p{i}.png", source_path=f"/x/p{i}.png", width=4 * S, height=S, gsd_mm=None,
            group_id=f"g{i}", sha256=f"{i:064d}",
            patches=[{"row": 0, "col": c, "x0": c * S, "y0": 0, "x1": (c + 1) * S, "y1": S,
                      "crop": f"patches/p{i}/{c}.png", "focus": 50.0, "clipped": 0.0}
                     for c in range(4)],
        )  # fmt: skip
    ws.add_labels([(r.id, names[r.col]) for r in ws.patches()], reviewer="t")


def test_orphaned_job_cells_never_enter_a_split_and_a_rerun_reuses_them(scanned, tmp_path):  # noqa: F811
    """Patches of a job's frames without a job record (what an interrupted sample of an
    older kit left): labelled, they stay out of every split; sampling the job again works,
    reuses the ones it draws (their answers kept) and removes those nobody touched."""
    import hashlib

    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    _ordinary_photos(ws)
    frame = sorted((out.parent / "frames").glob("*.png"))[0]
    ws.add_photo_with_patches(
        name=f"deck/{frame.name}", source_path=str(frame), width=8 * S, height=8 * S,
        gsd_mm=None, group_id="job:deck", sha256=hashlib.sha256(frame.read_bytes()).hexdigest(),
        patches=[{"row": r, "col": c, "x0": c * S, "y0": r * S, "x1": (c + 1) * S,
                  "y1": (r + 1) * S, "crop": f"patches/old/r{r:03d}_c{c:03d}.tiff",
                  "focus": 50.0, "clipped": 0.0} for r in range(8) for c in range(8)],
    )  # fmt: skip
    orphans = [r for r in ws.patches() if r.group == "job:deck"]
    labelled = orphans[:10]
    ws.add_labels([(r.id, "crack") for r in labelled], reviewer="t")
    split_workspace(ws, seed=0)
    assert not [r for r in ws.patches() if r.group == "job:deck" and r.subset]
    with pytest.raises(WorkspaceError, match="cannot join a split"):
        ws.set_split({labelled[0].id: "train"}, {})
    # A split table written by an older kit that holds one: the patch is in no subset.
    with ws.connect() as con:
        con.execute("INSERT INTO split_assignments VALUES (?, 'train')", (labelled[1].id,))
    assert next(r for r in ws.patches() if r.id == labelled[1].id).subset is None
    s = sample_scan(out, ws, cells=384, seed=1, job="deck")  # every cell: all orphans drawn
    assert s["cells"] == 384
    cells = {c["patch_id"] for c in ws.job_cells("deck")}
    assert {r.id for r in orphans} <= cells  # reused, with their answers
    assert ws.label_history(labelled[0].id)[0]["label"] == "crack"
    # Fewer cells in another job's rerun: untouched orphans go, answered ones stay.
    ws2 = new_ws(tmp_path / "ws2")
    _ordinary_photos(ws2)
    ws2.add_photo_with_patches(
        name=f"deck/{frame.name}", source_path=str(frame), width=8 * S, height=8 * S,
        gsd_mm=None, group_id="job:deck", sha256=hashlib.sha256(frame.read_bytes()).hexdigest(),
        patches=[{"row": 0, "col": c, "x0": c * S, "y0": 0, "x1": (c + 1) * S, "y1": S,
                  "crop": f"patches/old/r000_c{c:03d}.tiff", "focus": 50.0, "clipped": 0.0}
                 for c in range(8)],
    )  # fmt: skip
    kept = [r.id for r in ws2.patches() if r.group == "job:deck"][:2]
    ws2.add_labels([(i, "none") for i in kept], reviewer="t")
    sample_scan(out, ws2, cells=20, seed=4, job="deck")
    drawn = {c["patch_id"] for c in ws2.job_cells("deck")}
    left = {r.id for r in ws2.patches() if r.group == "job:deck"} - drawn
    assert left == set(kept) - drawn  # unlabelled orphans that were not drawn are gone


# ----- 5, 6. every check kept; records only after everything loaded ------------------------


def _experiment(tmp_path, *, checkpoint: bytes | None = None) -> Path:
    """An experiment folder holding the brightness model as its model.onnx and a checkpoint."""
    import torch

    exp = tmp_path / "exp"
    exp.mkdir()
    brightness_model(exp / "model.onnx", threshold=0.5)
    if checkpoint is None:
        torch.save({"config": {"backbone": "brightness"}, "input_px": S}, exp / "checkpoint.pt")
    else:
        (exp / "checkpoint.pt").write_bytes(checkpoint)
    return exp


def _job_scan(tmp_path, exp):
    frames, truth = make_job(tmp_path)
    scan_frames(exp / "model.onnx", [frames], tmp_path / "scan")
    return tmp_path / "scan", truth


def test_every_check_of_a_job_is_kept_with_its_bound(tmp_path):
    """REFUSED at 0.99, then a lower bound, then none: three records everywhere, the
    refusal among them (DESIGN.md: verifications are append-only)."""
    from trainkit.core.experiment import Experiment

    exp = _experiment(tmp_path)
    out, truth = _job_scan(tmp_path, exp)
    ws = new_ws(tmp_path / "ws")
    sample_scan(out, ws, cells=90, seed=1, job="deck")
    answer_from_truth(ws, truth)
    first = verify_scan(out, ws, require_recall=0.99)
    assert first["gate"]["passed"] is False
    low = first["estimate"]["recall"]["low"]
    second = verify_scan(out, ws, require_recall=round(low - 0.05, 2))
    assert second["gate"]["passed"] is True
    third = verify_scan(out, ws)
    bounds = [0.99, round(low - 0.05, 2), None]
    jobs = Experiment(exp).read_jobs()
    assert len(jobs) == 3 and [j.get("required_recall") for j in jobs] == bounds
    card = Experiment(exp).card_path.read_text(encoding="utf-8")
    rows = [ln for ln in card.splitlines() if ln.startswith("| deck |")]
    assert [r.split(" | ")[6] for r in rows] == ["REFUSED", "ACCEPTED", "no bound asked"]
    assert "0.990" in rows[0]
    checks = ws.verifications("deck")
    assert [c["required_recall"] for c in checks] == bounds
    assert [c["verdict"].split(":")[0] for c in checks] == ["REFUSED", "ACCEPTED", "no bound asked"]
    assert all(c["model"]["sha256"] for c in checks)
    assert [h["required_recall"] for h in third["history"]] == bounds
    saved = json.loads(Path(third["report"]).with_suffix(".json").read_text())
    assert [h["verdict"] for h in saved["history"]] == [c["verdict"] for c in checks]
    assert "check 3 of this job" in verdict_line(third) and "1 of them refused" in verdict_line(
        third
    )


def test_two_verifies_at_once_both_land_in_jobs_json_and_the_card(tmp_path, monkeypatch):
    import threading
    import time

    from trainkit.core.experiment import Experiment

    exp = _experiment(tmp_path)
    out, truth = _job_scan(tmp_path, exp)
    ws = new_ws(tmp_path / "ws")
    for name, seed in (("east", 1), ("west", 2)):
        sample_scan(out, ws, cells=40, seed=seed, job=name)
    answer_from_truth(ws, truth)
    real = Experiment.read_jobs

    def slow_read(self):  # widens the window between reading jobs.json and writing it
        jobs = real(self)
        time.sleep(0.5)
        return jobs

    monkeypatch.setattr(Experiment, "read_jobs", slow_read)
    runs = [threading.Thread(target=verify_scan, args=(out, ws), kwargs={"job": n})
            for n in ("east", "west")]  # fmt: skip
    for t in runs:
        t.start()
    for t in runs:
        t.join()
    monkeypatch.undo()
    assert sorted(j["job"] for j in Experiment(exp).read_jobs()) == ["east", "west"]
    card = Experiment(exp).card_path.read_text(encoding="utf-8")
    assert "| east |" in card and "| west |" in card


@pytest.mark.parametrize("broken", ["checkpoint", "export.json"])
def test_a_record_that_cannot_load_leaves_no_record(tmp_path, broken):
    """A refused checkpoint, or an export summary the card is made from that does not
    parse: verify stops before writing verification files, jobs.json or the card."""
    if broken == "checkpoint":
        exp = _experiment(tmp_path, checkpoint=b"not a torch checkpoint")
    else:
        exp = _experiment(tmp_path)
        (exp / "export.json").write_text("{torn")
    out, truth = _job_scan(tmp_path, exp)
    ws = new_ws(tmp_path / "ws")
    sample_scan(out, ws, cells=60, seed=1, job="deck")
    answer_from_truth(ws, truth)
    with pytest.raises(VerifyError, match="cannot be (loaded|written).*nothing was written"):
        verify_scan(out, ws, require_recall=0.5)
    assert not list(out.rglob("verification.*"))
    assert not (exp / "jobs.json").exists() and not (exp / "model-card.md").exists()
    assert ws.verifications() == []


# ----- 7. a sample grows without redrawing a cell ------------------------------------------


def test_more_cells_join_the_sample_as_one_stratified_sample(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    first = sample_scan(out, ws, cells=40, seed=1, job="deck")
    _fill(first["sample_csv"], truth, keep_empty=5)
    earlier = {c["patch_id"]: c for c in ws.job_cells("deck")}
    answer_from_truth(ws, truth)
    before = verify_scan(out, ws, job="deck")
    more = sample_scan(out, ws, more=50, seed=2, job="deck")
    assert more["cells"] == 50 and more["cells_in_job"] == 90
    cells = ws.job_cells("deck")
    assert len(cells) == 90 and set(earlier) <= {c["patch_id"] for c in cells}
    places = [(c["frame"], c["box"]) for c in cells]
    assert len(set(places)) == 90  # no cell drawn twice
    # Each cell's inclusion probability is (n1_h + n2_h) / N_h of its stratum (Cochran ch. 5).
    design = ws.jobs()[0]["design"]
    table = {s["stratum"]: s for s in design["strata"]}
    for c in cells:
        t = table[c["stratum"]]
        assert c["inclusion_probability"] == pytest.approx(
            sum(x["stratum"] == c["stratum"] for x in cells) / t["cells"]
        )
    assert sum(s["sampled"] for s in design["strata"]) == 90 and len(design["draws"]) == 2
    # The answers typed into sample.csv stay there; the new cells are added, unanswered.
    rows = {int(r["patch_id"]): r for r in _rows(more["sample_csv"])}
    assert len(rows) == 90 and sum(bool(r["label"]) for r in rows.values()) == 35
    assert more["answers_carried_over"] == 35
    answer_from_truth(ws, truth)
    after = verify_scan(out, ws, job="deck")
    assert after["cells_answered"] == 90 > before["cells_answered"]
    # verify counts every cell: the hand-computed Cochran ratio over all 90 answered cells.
    N = {s["stratum"]: s["cells"] for s in design["strata"]}
    ans = ws.job_cells("deck")
    tot = {h: N[h] / sum(c["stratum"] == h for c in ans) * sum(
        c["stratum"] == h and c["label"] == "crack" for c in ans) for h in N if N[h]}  # fmt: skip
    assert after["estimate"]["recall"]["estimate"] == pytest.approx(
        tot["flagged"] / sum(tot.values())
    )


def test_more_refuses_a_changed_scan_and_too_many_cells(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    with pytest.raises(SampleError, match="no job 'deck' to add cells to"):
        sample_scan(out, ws, more=10, seed=1, job="deck")
    sample_scan(out, ws, cells=40, seed=1, job="deck")
    with pytest.raises(SampleError, match=r"--more 400 is more than the 344 cells .* not drawn"):
        sample_scan(out, ws, more=400, seed=2, job="deck")
    with pytest.raises(SampleError, match="already holds job 'deck'.*--more N"):
        sample_scan(out, ws, cells=10, seed=2, job="deck")
    extra = out.parent / "frames"
    Image.fromarray(np.full((8 * S, 8 * S, 3), 200, np.uint8)).save(extra / "f9.png")
    scan_frames(brightness_model(out.parent / "m.onnx"), [extra], out)
    with pytest.raises(SampleError, match="a new sample starts a new check"):
        sample_scan(out, ws, more=10, seed=2, job="deck")
    assert len(ws.job_cells("deck")) == 40


# ----- 8. the message names the frames left out --------------------------------------------


def test_too_many_cells_says_how_many_frames_were_learned_from(scanned, tmp_path):  # noqa: F811
    out, _ = scanned
    rec = json.loads((out / "scan.json").read_text())
    frames = [json.loads(line) for line in (out / "frames.jsonl").read_text().splitlines()]
    rec["learned_frames"] = {f["sha256"]: f["frame"] for f in frames[:5]}
    (out / "scan.json").write_text(json.dumps(rec))
    with pytest.raises(SampleError) as err:
        sample_scan(out, new_ws(tmp_path / "ws"), cells=300, seed=1, job="x")
    msg = str(err.value)
    assert "--cells 300 is more than the 64 cells of the 1 frames" in msg
    assert "5 of the scan's 6 frames were left out because the scan's model learned" in msg


# ----- 9. names and CSV cells from users -----------------------------------------------------


@pytest.mark.parametrize(
    "name", ["a\n## Verdict: ACCEPTED by licensed engineer", "=cmd", "<script>", "x" * 65, "-x"]
)
def test_job_names_are_short_single_line_tokens(scanned, tmp_path, name):  # noqa: F811
    out, _ = scanned
    ws = new_ws(tmp_path / "ws")
    with pytest.raises(SampleError, match="job name .* cannot be used: it"):
        sample_scan(out, ws, cells=10, seed=1, job=name)
    assert ws.jobs() == [] and not (out / "jobs").exists()
    with pytest.raises(VerifyError, match="job name .* cannot be used"):
        verify_scan(out, ws, job=name)


def test_a_scan_folder_whose_name_is_no_job_name_asks_for_one(tmp_path):
    model = brightness_model(tmp_path / "m.onnx")
    frames, _ = make_job(tmp_path, n_frames=1)
    scan_frames(model, [frames], tmp_path / "scan results")
    with pytest.raises(SampleError, match="scan folder's name 'scan results'.*pass --job NAME"):
        sample_scan(tmp_path / "scan results", new_ws(tmp_path / "ws"), cells=5, seed=1)


def test_sample_csv_neutralises_formula_cells_and_reads_back(scanned, tmp_path):  # noqa: F811
    """OWASP "CSV Injection" guidance: a text cell starting with = + - @ tab or CR gets a
    leading apostrophe (common practice). Text typed into sample.csv's label column is
    carried into the file written by --more: there it is neutralised, once (a second
    rewrite does not add a second apostrophe), while numbers stay numbers."""
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    s = sample_scan(out, ws, cells=20, seed=1, job="deck")
    _fill(s["sample_csv"], truth)
    rows = _rows(s["sample_csv"])
    typed = {rows[0]["patch_id"]: '=HYPERLINK("http://x","y")', rows[1]["patch_id"]: "@SUM(1)"}
    for r in rows:
        r["label"] = typed.get(r["patch_id"], r["label"])
    with open(s["sample_csv"], "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    for step in (1, 2):
        sample_scan(out, ws, more=5, seed=1 + step, job="deck")
        after = {r["patch_id"]: r for r in _rows(s["sample_csv"])}
        assert len(after) == 20 + 5 * step
        for pid, text in typed.items():
            assert after[pid]["label"] == "'" + text
        for r in after.values():
            assert not any(r[k].startswith(("=", "+", "-", "@", "\t", "\r")) for k in r)
            assert 0.0 <= float(r["screening_probability"]) <= 1.0  # numbers stay numbers
            assert 0.0 < float(r["inclusion_probability"]) <= 1.0
    rows = list(after.values())
    for r in rows:  # the spreadsheet user corrects the two cells; the file imports
        if r["patch_id"] in typed:
            r["label"] = "none"
    with open(s["sample_csv"], "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    assert import_csv(ws, s["sample_csv"], reviewer="sheet") == 20


# ----- 10. status agrees with verify; the page lists what it says it lists -----------------


def test_status_counts_unsure_cells_as_verify_does(scanned, tmp_path):  # noqa: F811
    out, truth = scanned
    ws = new_ws(tmp_path / "ws")
    sample_scan(out, ws, cells=50, seed=1, job="deck")
    ids = [c["patch_id"] for c in ws.job_cells("deck")]
    answer_from_truth(ws, truth)
    ws.add_labels([(i, None) for i in ids[:10]], reviewer="sim")  # 10 unsure
    with ws.connect() as con:  # 5 never answered
        con.execute(f"DELETE FROM label_events WHERE patch_id IN ({','.join(map(str, ids[-5:]))})")
    v = verify_scan(out, ws, job="deck")
    status = ws.summary()["jobs"]["deck"]
    assert status == {"cells": 50, "answered": 35, "unsure": 10, "unanswered": 5}
    assert status["answered"] == v["cells_answered"]
    assert v["cells_unsure_or_unanswered"] == {"unsure": 10, "unanswered": 5}
    page = Path(v["report"]).read_text(encoding="utf-8")
    for c in v["unresolved_cells"]:  # every unsure or unanswered cell is listed
        box = ", ".join(map(str, c["box"]))
        assert f"<tr><td>{c['patch_id']}</td><td>{c['frame']}</td><td>{box}</td>" in page
    assert len(v["unresolved_cells"]) == 15
    assert str(out.parent / "m.onnx") in page and v["model"]["sha256"] in page
