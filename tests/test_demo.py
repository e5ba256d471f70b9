"""The demo chain end to end on a cut-down setting, and the folder contract it leaves."""

from __future__ import annotations

import csv
import json

import numpy as np
import onnxruntime as ort
import pytest
from click.testing import CliRunner

from trainkit.cli import cli
from trainkit.demo import STEPS
from trainkit.export.onnx_file import read_metadata
from trainkit.store.workspace import Workspace


def test_demo_leaves_the_experiment_folder(demo_run):
    out, headline = demo_run
    for rel in (
        "model.onnx",
        "evaluation/metrics.json",
        "evaluation/report.html",
        "evaluation/predictions.csv",
        "checkpoint.pt",
        "history.csv",
        "recipe.yaml",
        "scan/frames.jsonl",
        "demo-summary.json",
    ):
        assert (out / rel).is_file(), rel
    assert (out / "workspace" / "workspace.sqlite").is_file()
    history = list(csv.DictReader((out / "history.csv").open()))
    assert len(history) == 2 and float(history[0]["train_images_per_s"]) > 0
    assert 0.0 <= headline["screening_recall"] <= 1.0


def test_metrics_recomputed_from_predictions_csv(demo_run):
    """Every figure must be recomputable from predictions.csv (checked with scikit-learn)."""
    from sklearn.metrics import confusion_matrix, recall_score

    out, _ = demo_run
    m = json.loads((out / "evaluation/metrics.json").read_text())
    rows = list(csv.DictReader((out / "evaluation/predictions.csv").open()))
    names = m["class_names"]
    assert set(rows[0]) >= {
        "patch_id",
        "photo",
        "group",
        "true",
        "predicted",
        "screening_probability",
        *[f"p_{n}" for n in names],
    }
    y = [names.index(r["true"]) for r in rows]
    p = [names.index(r["predicted"]) for r in rows]
    assert confusion_matrix(y, p, labels=range(len(names))).tolist() == m["confusion_matrix"]
    scr = np.array([float(r["screening_probability"]) for r in rows])
    thr = m["screening"]["threshold"]
    crack = np.array(y) != 0
    flagged = scr >= thr
    assert recall_score(crack, flagged) == pytest.approx(m["screening"]["recall"], abs=1e-9)
    probs = np.array([[float(r[f"p_{n}"]) for n in names] for r in rows])
    np.testing.assert_allclose(probs.sum(1), 1.0, atol=1e-5)


def test_no_photo_in_two_subsets(demo_run):
    out, _ = demo_run
    recs = Workspace.open(out / "workspace").patches()
    by_photo = {}
    for r in recs:
        if r.subset:
            by_photo.setdefault(r.photo, set()).add(r.subset)
    assert by_photo and all(len(s) == 1 for s in by_photo.values())


def test_onnx_contract(demo_run):
    out, _ = demo_run
    sess = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    (inp,), (outp, fam) = sess.get_inputs(), sess.get_outputs()
    assert inp.name == "image" and inp.type == "tensor(uint8)" and inp.shape[1:] == [128, 128, 3]
    assert isinstance(inp.shape[0], str)  # dynamic batch
    assert outp.name == "probabilities" and outp.type == "tensor(float)"
    assert fam.name == "familiarity" and fam.type == "tensor(float)"  # contract 2
    for n in (1, 3):
        probs = sess.run(None, {"image": np.zeros((n, 128, 128, 3), np.uint8)})[0]
        assert probs.shape == (n, 6)
        np.testing.assert_allclose(probs.sum(1), 1.0, atol=1e-5)
    meta = read_metadata(out / "model.onnx")
    assert json.loads(meta["class_names"])[0] == "none"
    assert json.loads(meta["angle_centres"]) == [None, 0.0, 45.0, 90.0, 135.0, None]
    assert int(meta["patch_px"]) == 128
    m = json.loads((out / "evaluation/metrics.json").read_text())
    assert json.loads(meta["threshold"]) == pytest.approx(m["screening"]["threshold"])
    assert json.loads(meta["patch_mm"]) > 0 and len(meta["data_digest"]) == 64


def test_evaluate_and_export_commands_work_on_the_demo_folder(demo_run):
    out, _ = demo_run
    runner = CliRunner()
    res = runner.invoke(cli, ["-q", "evaluate", str(out), "--json"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    assert json.loads(res.output)["split"] == "test"
    res = runner.invoke(cli, ["-q", "export", str(out)], catch_exceptions=False)
    assert res.exit_code == 0, res.output


def test_acceptance_gate_exit_code(demo_run):
    out, _ = demo_run
    runner = CliRunner()
    res = runner.invoke(cli, ["-q", "evaluate", str(out), "--require-recall", "1.0", "--json"])
    assert res.exit_code == 3  # a lower bound is below 1 for any finite test set
    assert json.loads(res.output)["gate"]["passed"] is False
    res = runner.invoke(cli, ["-q", "evaluate", str(out), "--require-recall", "0.0", "--json"])
    assert res.exit_code == 0


def test_report_states_the_cautions(demo_run):
    out, _ = demo_run
    page = (out / "evaluation/report.html").read_text()
    assert "not an inspection" in page and "licensed engineers" in page
    assert page.count("data:image/png;base64,") >= 2


def test_scan_lines(demo_run):
    out, _ = demo_run
    lines = [json.loads(x) for x in (out / "scan/frames.jsonl").read_text().splitlines()]
    assert len(lines) == 6 and all(rec["status"] == "ok" for rec in lines)
    assert all(rec["cells"] == 24 for rec in lines)  # 768x512 at 128 px: 6 x 4
    assert all(len(rec["sha256"]) == 64 and "dominant_class" in rec for rec in lines)
    flagged = sorted(rec["frame"] for rec in lines if rec["flagged"])
    assert (out / "scan/flagged.txt").read_text().split() == flagged


def test_demo_reports_through_its_callbacks(demo_run, demo_events):
    """run_demo prints nothing itself: steps, tasks, epochs and results reach the callbacks."""
    out, _ = demo_run
    sections = [e[1] for e in demo_events if e[0] == "section"]
    assert sections == [f"{i}/7 {title}" for i, title in enumerate(STEPS, start=1)] + ["done"]
    assert [e[1] for e in demo_events if e[0] == "task"] == [
        "tiling photos",
        "training",
        "scanning frames",
    ]
    history = list(csv.DictReader((out / "history.csv").open()))
    assert [e[1] for e in demo_events if e[0] == "epoch"] == [int(r["epoch"]) for r in history]
    (split,) = [e[1] for e in demo_events if e[0] == "split"]
    recs = Workspace.open(out / "workspace").patches()
    assert sum(sum(c.values()) for c in split["class_counts"].values()) <= len(recs)
    (evaluated,) = [e for e in demo_events if e[0] == "evaluated"]
    written = json.loads((out / "evaluation/metrics.json").read_text())
    for key in ("class_names", "confusion_matrix", "split", "patches"):
        assert evaluated[1][key] == written[key], key
    for key in ("recall", "threshold", "false_alarm_rate"):
        assert evaluated[1]["screening"][key] == pytest.approx(written["screening"][key]), key
    assert evaluated[2] == out / "evaluation"
    cautions = [e[1] for e in demo_events if e[0] == "line" and e[2]]
    assert len(cautions) == 1 and "not an inspection" in cautions[0]


def test_demo_module_does_not_import_the_command_line():
    """The library demo must not reach into trainkit.cli (that was an import cycle)."""
    import ast
    import inspect

    import trainkit.demo

    tree = ast.parse(inspect.getsource(trainkit.demo))
    names = [
        ("trainkit." * bool(n.level) + (n.module or ""))
        if isinstance(n, ast.ImportFrom)
        else a.name
        for n in ast.walk(tree)
        if isinstance(n, ast.Import | ast.ImportFrom)
        for a in n.names
    ]
    assert "trainkit.core.fsutil" in names  # the walk saw the imports
    assert not [n for n in names if n.startswith(("trainkit.cli", "click", "rich"))]


def _first_photos_split(n: int) -> dict[str, str]:
    """The demo's split of the labelled patches of the tiny dataset's first ``n`` photos."""
    from trainkit.core.decode import list_images
    from trainkit.demo import DEMO_SPLIT, tiny_dataset_dir
    from trainkit.labels.splits import assign_groups

    data = tiny_dataset_dir()
    keep = {f.name for f in list_images([data / "photos"])[:n]}
    with (data / "labels.csv").open(encoding="utf-8") as fh:
        rows = [r for r in csv.DictReader(fh) if r["photo"] in keep and r["label"]]
    return assign_groups([r["label"] for r in rows], [r["photo"] for r in rows], **DEMO_SPLIT)


def test_min_photos_is_the_fewest_the_demos_split_accepts():
    """MIN_PHOTOS comes from the split itself: one photo fewer fails, every count up to 40 splits."""
    from trainkit.demo import MIN_PHOTOS, TINY_DATASET
    from trainkit.labels.splits import SplitError

    with pytest.raises(SplitError, match="for validation: that needs at least 5 groups"):
        _first_photos_split(MIN_PHOTOS - 1)
    for n in range(MIN_PHOTOS, TINY_DATASET["n_photos"] + 1):
        assert set(_first_photos_split(n).values()) == {"train", "val", "test"}, n


def test_demo_refuses_too_few_photos_at_the_option_check(tmp_path, monkeypatch):
    import trainkit.demo
    from trainkit.demo import MIN_PHOTOS

    calls = []
    monkeypatch.setattr(trainkit.demo, "run_demo", lambda *a, **k: calls.append(k))
    out = tmp_path / "demo"
    res = CliRunner().invoke(cli, ["demo", "--out", str(out), "--photos", str(MIN_PHOTOS - 1)])
    assert res.exit_code == 2, res.output  # a usage error: nothing ran
    assert f"at least {MIN_PHOTOS}" in res.output and f"got {MIN_PHOTOS - 1}" in res.output
    assert not calls and not out.exists()
    res = CliRunner().invoke(cli, ["demo", "--out", str(out), "--photos", str(MIN_PHOTOS)])
    assert res.exit_code == 0, res.output
    assert calls[0]["photos"] == MIN_PHOTOS


def test_run_demo_refuses_too_few_photos_before_it_writes(tmp_path):
    from trainkit.demo import MIN_PHOTOS, run_demo
    from trainkit.labels.splits import SplitError

    with pytest.raises(SplitError, match=f"at least {MIN_PHOTOS} photos"):
        run_demo(tmp_path / "demo", photos=MIN_PHOTOS - 1)
    assert not (tmp_path / "demo").exists()
