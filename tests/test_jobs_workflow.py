"""A job's acceptance sample end to end: scan, sample into a workspace, answer, verify.

The screener is the hand-built brightness model of test_screener (darker cell, higher
screening probability); the frames are made here with a known truth per cell, and a
simulated reviewer answers from that truth.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from test_screener import S, brightness_model

from trainkit.core.taxonomy import load_class_set
from trainkit.jobs.files import JobFiles
from trainkit.jobs.sample import SampleError, read_scan_cells, sample_scan
from trainkit.jobs.verify import VerifyError, verify_scan
from trainkit.labels.labels_io import import_csv
from trainkit.labels.review import build_queue
from trainkit.labels.splits import split_workspace
from trainkit.screener.scan import scan_frames
from trainkit.store.workspace import Workspace

# Grey level of a cell -> (is it a crack, screening probability of the brightness model)
#   60: dark crack, flagged;  90: dark stain, a false alarm;  131: faint crack or not, "near";
#   160: faint crack the model misses ("rest");  200: clean concrete ("rest").
KINDS = {"crack": (60, True), "stain": (90, False), "near_crack": (131, True),
         "near_clean": (131, False), "missed": (160, True), "clean": (200, False)}  # fmt: skip


def make_job(tmp_path, n_frames=6, seed=0):
    """Frames of 8 x 8 cells of S px with a known kind per cell; returns (folder, truth)."""
    rng = np.random.default_rng(seed)
    d = tmp_path / "frames"
    d.mkdir()
    truth = {}
    kinds = list(KINDS)
    weights = np.array([0.06, 0.03, 0.04, 0.04, 0.03, 0.80])
    for f in range(n_frames):
        img = np.zeros((8 * S, 8 * S, 3), np.uint8)
        for r in range(8):
            for c in range(8):
                kind = kinds[rng.choice(len(kinds), p=weights)]
                img[r * S : (r + 1) * S, c * S : (c + 1) * S] = KINDS[kind][0]
                truth[(f"f{f}.png", (c * S, r * S, (c + 1) * S, (r + 1) * S))] = KINDS[kind][1]
        Image.fromarray(img).save(d / f"f{f}.png")
    return d, truth


@pytest.fixture()
def scanned(tmp_path):
    model = brightness_model(tmp_path / "m.onnx", threshold=0.5)
    frames, truth = make_job(tmp_path)
    out = tmp_path / "scan"
    scan_frames(model, [frames], out)
    return out, truth


def new_ws(path):
    return Workspace.create(path, class_set=load_class_set("presence"), tile_px=S)


def answer_from_truth(ws, truth):
    """The simulated reviewer: answers every job cell from the frames' truth."""
    items = []
    for r in ws.patches():
        if r.job is not None:
            frame = r.photo.split("/", 1)[1]
            items.append((r.id, "crack" if truth[(frame, r.box)] else "none"))
    return ws.add_labels(items, reviewer="sim")


def test_scan_records_every_cell_for_the_sample(scanned):
    out, truth = scanned
    cells = read_scan_cells(out)
    assert len(cells) == len(truth) == 6 * 64
    # The brightness model's screening probability: sigmoid((128 - grey) / 5).
    i = int(np.flatnonzero(cells.frame_index == 0)[0])
    frame = cells.frames[0]["frame"].rsplit("/", 1)[1]
    grey = [g for k, (g, crack) in KINDS.items()]
    p = cells.probabilities[i]
    assert min(abs(p - 1 / (1 + np.exp(-(128 - g) / 5))) for g in grey) < 1e-3
    assert tuple(cells.boxes[i]) in {b for (f, b) in truth if f == frame}


def test_sample_is_reproducible_stratified_and_kept_out_of_splits(scanned, tmp_path):
    out, truth = scanned
    ws1, ws2 = new_ws(tmp_path / "a"), new_ws(tmp_path / "b")
    s1 = sample_scan(out, ws1, cells=60, seed=3)
    rows1 = list(csv.DictReader(open(s1["sample_csv"])))
    s2 = sample_scan(out, ws2, cells=60, seed=3, job="again")
    rows2 = list(csv.DictReader(open(s2["sample_csv"])))
    key = lambda r: (r["frame"], r["x0"], r["y0"], r["stratum"])  # noqa: E731
    assert sorted(map(key, rows1)) == sorted(map(key, rows2)) and len(rows1) == 60
    assert s1["strata"] == s2["strata"]
    # Each cell's inclusion probability is n_h / N_h of its stratum (Cochran ch. 5).
    table = {s["stratum"]: s for s in s1["strata"]}
    for r in rows1:
        t = table[r["stratum"]]
        assert float(r["inclusion_probability"]) == pytest.approx(t["sampled"] / t["cells"])
    assert sum(t["cells"] for t in s1["strata"]) == len(truth)
    # Job cells never join a split, and they come first in the review queue.
    ws1.add_labels([(r.id, "none") for r in ws1.patches()][:5], reviewer="x")
    with pytest.raises(ValueError, match="no labelled patches"):
        split_workspace(ws1)
    queue = build_queue(ws1.patches(), reviewer="sim")
    assert set(queue) == {r.id for r in ws1.patches() if not r.labelled}
    with pytest.raises(SampleError, match="already holds job"):
        sample_scan(out, ws1, cells=10, seed=4)


def test_answers_through_sample_csv_equal_answers_in_review(scanned, tmp_path):
    out, truth = scanned
    ws_a, ws_b = new_ws(tmp_path / "a"), new_ws(tmp_path / "b")
    sample_scan(out, ws_a, cells=80, seed=5)
    answer_from_truth(ws_a, truth)
    a = verify_scan(out, ws_a)
    path = Path(sample_scan(out, ws_b, cells=80, seed=5, job="b")["sample_csv"])
    rows = list(csv.DictReader(path.open()))
    for r in rows:
        frame = r["frame"].rsplit("/", 1)[1]
        box = tuple(int(r[k]) for k in ("x0", "y0", "x1", "y1"))
        r["label"] = "crack" if truth[(frame, box)] else "none"
    rows[0]["label"] = ""  # left unanswered: skipped, not stored as unsure
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    assert import_csv(ws_b, path, reviewer="sheet") == 79
    assert verify_scan(out, ws_b)["cells_unsure_or_unanswered"] == {"unsure": 0, "unanswered": 1}
    first = rows[0]
    box = tuple(int(first[k]) for k in ("x0", "y0", "x1", "y1"))
    crack = truth[(first["frame"].rsplit("/", 1)[1], box)]
    ws_b.add_labels([(int(first["patch_id"]), "crack" if crack else "none")], reviewer="sheet")
    b = verify_scan(out, ws_b)
    assert a["estimate"] == b["estimate"]
    assert a["cells_answered"] == b["cells_answered"] == 80


def test_verify_counts_unresolved_cells_and_applies_the_gate(scanned, tmp_path):
    out, truth = scanned
    ws = new_ws(tmp_path / "w")
    with pytest.raises(VerifyError, match="no sample"):
        verify_scan(out, ws)
    sample_scan(out, ws, cells=90, seed=1)
    answer_from_truth(ws, truth)
    job_ids = [r.id for r in ws.patches() if r.job is not None]
    # Take back two answers and mark one unsure: reported, never silently dropped.
    events = {e["patch_id"]: e["id"] for e in ws.label_events()}
    strata = {c["patch_id"]: c["stratum"] for c in ws.job_cells(ws.jobs()[0]["name"])}
    rest = [p for p in job_ids if strata[p].startswith("rest")]  # rest or its bands
    ws.undo_label_event(events[rest[0]])
    ws.undo_label_event(events[rest[1]])
    ws.add_labels([(rest[2], None)], reviewer="sim")
    res = verify_scan(out, ws, require_recall=0.99)
    assert res["cells_unsure_or_unanswered"] == {"unsure": 1, "unanswered": 2}
    assert res["cells_answered"] == 87
    # The recall estimate equals the Cochran stratified ratio computed by hand here.
    cells = ws.job_cells(res["job"])
    N = {s["stratum"]: s["cells"] for s in ws.jobs()[0]["design"]["strata"]}
    ans = [c for c in cells if c["answered"] and c["label"] is not None]
    tot = {h: N[h] / sum(c["stratum"] == h for c in ans) * sum(
        c["stratum"] == h and c["label"] == "crack" for c in ans) for h in N if N[h]}  # fmt: skip
    assert res["estimate"]["recall"]["estimate"] == pytest.approx(
        tot["flagged"] / sum(tot.values())
    )
    # The brightness model misses the faint cracks: the gate refuses at 0.99.
    assert res["gate"]["passed"] is False and res["gate"]["verdict"].startswith("REFUSED")
    files = JobFiles(out, res["job"])
    saved = json.loads(files.verification_json.read_text())
    assert saved["estimate"] == res["estimate"]
    html = files.verification_html.read_text()
    assert "triage aid" in html and html.rstrip().endswith("</html>")


def test_the_job_loop_through_the_command_line(tmp_path):
    """scan -> sample -> answers through sample.csv and `review --import-csv` -> verify."""
    from click.testing import CliRunner

    from trainkit.cli import cli

    model = brightness_model(tmp_path / "m.onnx", threshold=0.5)
    frames, truth = make_job(tmp_path)
    ws = tmp_path / "ws"
    new_ws(ws)
    run = CliRunner().invoke
    scan_out = tmp_path / "scan"
    assert (
        run(
            cli, ["-q", "scan", str(frames), "--model", str(model), "--out", str(scan_out)]
        ).exit_code
        == 0
    )
    r = run(cli, ["sample", str(scan_out), "--workspace", str(ws), "--cells", "70"])
    assert r.exit_code == 2 and "--seed is required" in r.output
    r = run(cli, ["sample", str(scan_out), "--workspace", str(ws), "--cells", "70", "--seed", "2"])
    assert r.exit_code == 0, r.output
    assert "70 cells drawn" in r.output and "trainkit verify" in r.output
    path = JobFiles(scan_out, "scan").sample_csv
    rows = list(csv.DictReader(path.open()))
    for row in rows:
        box = tuple(int(row[k]) for k in ("x0", "y0", "x1", "y1"))
        row["label"] = "crack" if truth[(row["frame"].rsplit("/", 1)[1], box)] else "none"
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    r = run(cli, ["review", str(ws), "--reviewer", "ana", "--import-csv", str(path)])
    assert r.exit_code == 0, r.output
    r = run(cli, ["verify", str(scan_out), "--workspace", str(ws), "--require-recall", "0.99"])
    assert r.exit_code == 3 and "REFUSED" in r.output and "70 answered cells" in r.output
    r = run(cli, ["verify", str(scan_out), "--workspace", str(ws), "--json"])
    assert r.exit_code == 0 and json.loads(r.output)["cells_answered"] == 70
    more = ["sample", str(scan_out), "--workspace", str(ws), "--seed", "3", "--more", "20"]
    r = run(cli, [*more, "--cells", "5"])
    assert r.exit_code == 2 and "give one of them" in r.output
    r = run(cli, more)
    assert r.exit_code == 0, r.output
    assert "20 more cells drawn" in r.output and "the sample now holds 90 cells" in r.output
    assert "kept the 70 answers typed into" in r.output


def test_a_job_check_is_recorded_with_the_model_and_on_its_card(demo_run, tmp_path):
    """The demo's exported model scans two fresh synthetic frames; the check of that job is
    recorded in the experiment (jobs.json), on the model card and in `status`."""
    import shutil

    from trainkit.core.experiment import Experiment
    from trainkit.synth import SynthOptions, generate_photo

    out, _ = demo_run
    exp = tmp_path / "exp"
    shutil.copytree(out, exp, ignore=shutil.ignore_patterns("workspace", "scan*"))
    frames = tmp_path / "frames"
    frames.mkdir()
    for seed in (41, 42):
        photo = generate_photo(seed, SynthOptions(width=512, height=384))
        Image.fromarray(photo.image).save(frames / f"frame-{seed}.png")
    scan_out = tmp_path / "scan"
    scan_frames(exp / "model.onnx", [frames], scan_out)
    assert json.loads((scan_out / "scan.json").read_text())["model"] == str(exp / "model.onnx")
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=128)
    sample_scan(scan_out, ws, cells=20, seed=1)
    cells = ws.job_cells(ws.jobs()[0]["name"])
    ws.add_labels(
        [(c["patch_id"], "map" if c["stratum"] == "flagged" else "none") for c in cells],
        reviewer="sim",
    )
    res = verify_scan(scan_out, ws)
    assert res["recorded_in"] == str(exp)
    folder = Experiment(exp)
    assert [j["job"] for j in folder.read_jobs()] == ["scan"]
    card = folder.card_path.read_text(encoding="utf-8")
    assert "## Jobs checked" in card and "| scan |" in card
    assert folder.status()["jobs_checked"] == 1


def test_verify_refuses_a_model_re_exported_since_the_scan(scanned, tmp_path):
    """scan.json keeps the model file's SHA-256 (hashlib as the reference); a model file that
    changed between scan and verify is refused in one line naming both digests and paths."""
    import hashlib

    out, truth = scanned
    model = tmp_path / "m.onnx"
    at_scan = hashlib.sha256(model.read_bytes()).hexdigest()
    assert json.loads((out / "scan.json").read_text())["model_sha256"] == at_scan
    ws = new_ws(tmp_path / "w")
    sample_scan(out, ws, cells=40, seed=2)
    answer_from_truth(ws, truth)
    res = verify_scan(out, ws)
    assert res["model"]["sha256"] == res["model"]["sha256_at_scan"] == at_scan
    brightness_model(model, threshold=0.4)  # re-exported: other metadata, other bytes
    now = hashlib.sha256(model.read_bytes()).hexdigest()
    assert now != at_scan
    before = ws.verifications(res["job"])
    with pytest.raises(VerifyError) as info:
        verify_scan(out, ws)
    msg = str(info.value)
    assert "\n" not in msg
    assert at_scan in msg and now in msg and str(model) in msg and str(out) in msg
    assert ws.verifications(res["job"]) == before  # nothing recorded for the refused check


def test_sample_resolves_an_older_scans_relative_frames_from_any_folder(
    scanned, tmp_path, monkeypatch
):
    """An older scan recorded frame paths relative to the folder it ran in (kept as
    scan.json's working_folder): sample finds them through the scan's frame_path rule
    wherever it runs."""
    import os

    from trainkit.screener.scan import frame_path

    out, truth = scanned
    lines = (out / "frames.jsonl").read_text().splitlines()
    recs = [json.loads(line) for line in lines]
    for r in recs:  # as an older kit wrote them: relative to the scan's working folder
        r["frame"] = os.path.relpath(r["frame"], tmp_path)
        assert not os.path.isabs(r["frame"])
    (out / "frames.jsonl").write_text("".join(json.dumps(r) + "\n" for r in recs))
    scan_json = json.loads((out / "scan.json").read_text())
    (out / "scan.json").write_text(json.dumps({**scan_json, "working_folder": str(tmp_path)}))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    ws = new_ws(tmp_path / "w")
    res = sample_scan(out, ws, cells=30, seed=4)
    frames = {c["frame"] for c in ws.job_cells(res["job"])}
    assert frames and all(os.path.isabs(f) and Path(f).is_file() for f in frames)
    assert frames <= {str(frame_path(out, r["frame"])) for r in recs}
    answer_from_truth(ws, truth)
    assert verify_scan(out, ws)["cells_answered"] == 30
    # A later draw for the same job matches the earlier cells through the same rule.
    assert sample_scan(out, ws, job=res["job"], more=10, seed=5)["cells_in_job"] == 40
