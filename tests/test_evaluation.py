"""Tests for trainkit.judging.evaluation: metrics.json recomputed from predictions.csv, comparison, gate."""

from __future__ import annotations

import csv
import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from sklearn import metrics as skm

from trainkit.judging.evaluation import CAUTION, EvaluationError, evaluate_experiment
from trainkit.store.workspace import Workspace

# The metrics.json contract documented in the trainkit.judging.evaluation module docstring.
TOP_LEVEL_KEYS = {
    "metrics_version", "split", "patches", "photos", "class_names", "accuracy",
    "confusion_matrix", "confusion_matrix_row_normalised", "per_class", "screening",
    "expected_calibration_error", "calibration", "by_photo", "by_group", "by_scale",
    "interval_method", "confidence", "comparison", "gate", "cascade", "experiment", "workspace",
    "model", "checkpoint_epoch", "data_digest", "evaluated_digest", "kit_version", "created", "caution",
}  # fmt: skip
SCREENING_KEYS = {
    "threshold", "threshold_source", "threshold_independent", "target_recall", "max_false_alarms",
    "tp", "fn", "fp",
    "tn", "recall", "recall_ci_low", "recall_ci_high", "recall_interval", "specificity",
    "false_alarm_rate", "precision", "flagged_share", "validation", "at_default_threshold",
    "promise",
}  # fmt: skip
PER_CLASS_KEYS = {
    "name", "index", "precision", "recall", "f1", "support", "recall_ci_low", "recall_ci_high",
    "recall_interval",
}  # fmt: skip
BREAKDOWN_KEYS = {
    "key", "patches", "cracks", "cracks_found", "recall", "recall_ci_low", "recall_ci_high",
    "clean", "false_alarms", "false_alarm_rate", "accuracy",
}  # fmt: skip


def _clone_experiment(src: Path, dst: Path) -> Path:
    """A new experiment folder with the same checkpoint, so evaluations do not clobber src."""
    dst.mkdir(parents=True)
    for name in ("checkpoint.pt", "experiment.json", "recipe.yaml"):
        shutil.copy2(src / name, dst / name)
    return dst


def _rows(path: Path) -> list[dict]:
    with path.open(newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def evaluated(demo_run, tmp_path_factory):
    """Experiment A (the demo's checkpoint) evaluated against B (1 epoch on the same data)."""
    from trainkit.learning.config import load_train_config
    from trainkit.learning.training import train

    out, _ = demo_run
    root = tmp_path_factory.mktemp("evaluation")
    a = _clone_experiment(out, root / "a")
    b = root / "b"
    train(Workspace.open(out / "workspace"), b, load_train_config("demo", {"epochs": 1}))
    res = evaluate_experiment(a, against=b, temperature_scaling=True, require_recall=0.0)
    return a, b, res


def test_metrics_json_has_the_documented_keys(evaluated):
    a, _, res = evaluated
    on_disk = json.loads((a / "evaluation/metrics.json").read_text())
    assert on_disk == res  # the returned dict is exactly the file (NaN written as null)
    assert set(res) == TOP_LEVEL_KEYS
    assert set(res["screening"]) == SCREENING_KEYS
    assert all(set(c) == PER_CLASS_KEYS for c in res["per_class"])
    assert all(set(r) == BREAKDOWN_KEYS for k in ("by_photo", "by_group") for r in res[k])
    assert res["caution"] == CAUTION and "not an inspection" in CAUTION
    assert res["interval_method"] == "wilson" and res["screening"]["threshold_independent"]


def test_figures_recompute_from_predictions_csv(evaluated):
    """Confusion matrix, per-class scores and intervals, screening: sklearn and scipy."""
    a, _, res = evaluated
    rows = _rows(a / "evaluation/predictions.csv")
    names = res["class_names"]
    y = np.array([names.index(r["true"]) for r in rows])
    pred = np.array([names.index(r["predicted"]) for r in rows])
    labels = list(range(len(names)))
    cm = skm.confusion_matrix(y, pred, labels=labels)
    assert cm.tolist() == res["confusion_matrix"]
    norm = cm / np.maximum(cm.sum(1, keepdims=True), 1)
    np.testing.assert_allclose(res["confusion_matrix_row_normalised"], norm, atol=5e-5)
    p, r, f, s = skm.precision_recall_fscore_support(y, pred, labels=labels, zero_division=0)
    for i, c in enumerate(res["per_class"]):
        assert (c["precision"], c["recall"], c["f1"], c["support"]) == pytest.approx(
            (p[i], r[i], f[i], s[i])
        )
        if s[i]:  # scipy's Wilson interval on k/n = diagonal / row sum
            ref = stats.binomtest(int(cm[i, i]), int(s[i])).proportion_ci(method="wilson")
            assert (c["recall_ci_low"], c["recall_ci_high"]) == pytest.approx((ref.low, ref.high))
            assert c["recall_interval"]["low"] == c["recall_ci_low"]
        else:  # a class absent from the test set has no recall interval
            assert c["recall_ci_low"] is None and c["recall_interval"]["n"] == 0
    scr = np.array([float(r["screening_probability"]) for r in rows])
    sc = res["screening"]
    crack, flagged = y != 0, scr >= sc["threshold"]
    assert sc["recall"] == pytest.approx(skm.recall_score(crack, flagged))
    assert sc["specificity"] == pytest.approx(skm.recall_score(~crack, ~flagged))
    assert sc["false_alarm_rate"] == pytest.approx(1 - sc["specificity"])
    assert sc["fp"] == int((flagged & ~crack).sum())
    ref = stats.binomtest(sc["tp"], int(crack.sum())).proportion_ci(method="wilson")
    assert (sc["recall_ci_low"], sc["recall_ci_high"]) == pytest.approx((ref.low, ref.high))
    d = sc["at_default_threshold"]
    assert d["recall"] == pytest.approx(skm.recall_score(crack, scr >= 0.5))
    assert res["accuracy"] == pytest.approx(skm.accuracy_score(y, pred))


def test_breakdowns_recompute_from_predictions_csv(evaluated):
    a, _, res = evaluated
    rows = _rows(a / "evaluation/predictions.csv")
    thr = res["screening"]["threshold"]
    for key, col in (("by_photo", "photo"), ("by_group", "group")):
        groups = sorted({r[col] for r in rows})
        assert [g["key"] for g in res[key]] == groups
        for g in res[key]:
            sub = [r for r in rows if r[col] == g["key"]]
            crack = np.array([r["true"] != "none" for r in sub])
            flagged = np.array([float(r["screening_probability"]) >= thr for r in sub])
            assert g["patches"] == len(sub) and g["cracks"] == crack.sum()
            if crack.any():  # reference: sklearn recall_score within the group
                assert g["recall"] == pytest.approx(skm.recall_score(crack, flagged))
            else:
                assert g["recall"] is None
            assert g["false_alarms"] == int((flagged & ~crack).sum())
    # The demo photos have a scale, so every patch falls in a width band.
    assert res["by_scale"] and sum(b["patches"] for b in res["by_scale"]) == res["patches"]
    assert "unknown" not in [b["key"] for b in res["by_scale"]]


def test_calibration_block(evaluated):
    a, _, res = evaluated
    rows = _rows(a / "evaluation/predictions.csv")
    names = res["class_names"]
    probs = np.array([[float(r[f"p_{n}"]) for n in names] for r in rows])
    correct = probs.argmax(1) == np.array([names.index(r["true"]) for r in rows])
    conf = probs.max(1)
    # Guo et al. (2017) ECE, written out as a loop over 10 equal-width bins (lo, hi].
    ece = 0.0
    for m in range(10):
        inb = (conf > m / 10) & (conf <= (m + 1) / 10)
        if inb.any():
            ece += inb.mean() * abs(correct[inb].mean() - conf[inb].mean())
    cal = res["calibration"]
    assert cal["ece"] == pytest.approx(ece, abs=1e-6) == res["expected_calibration_error"]
    assert sum(b["count"] for b in cal["bins"]) == len(rows)
    t = cal["temperature"]
    assert t["value"] > 0 and t["val_nll_after"] <= t["val_nll_before"] + 1e-12
    assert sum(b["count"] for b in t["bins_after"]) == len(rows)
    assert "report only" in t["applied_to"]


def test_comparison_mcnemar_recomputed(evaluated):
    """McNemar on crack patches, rebuilt from A's predictions and disagreements.csv."""
    from statsmodels.stats import contingency_tables as ct  # in the dev extra

    a, b, res = evaluated
    comp = res["comparison"]
    assert comp["experiment_b"] == str(b.resolve())
    pred_a = {int(r["patch_id"]): r for r in _rows(a / "evaluation/predictions.csv")}
    dis = _rows(a / "evaluation" / comp["disagreements_csv"])
    assert len(dis) == comp["disagreements"]
    thr_a = comp["a"]["threshold"]
    flag_a = {i: float(r["screening_probability"]) >= thr_a for i, r in pred_a.items()}
    flag_b = dict(flag_a)
    for r in dis:
        assert int(r["flagged_a"]) == flag_a[int(r["patch_id"])]
        assert float(r["screening_probability_a"]) == float(
            pred_a[int(r["patch_id"])]["screening_probability"]
        )
        flag_b[int(r["patch_id"])] = bool(int(r["flagged_b"]))
    cracks = [i for i, r in pred_a.items() if r["true"] != "none"]
    fa = np.array([flag_a[i] for i in cracks])
    fb = np.array([flag_b[i] for i in cracks])
    table = [[int((fa & fb).sum()), int((fa & ~fb).sum())], [int((~fa & fb).sum()), 0]]
    table[1][1] = len(cracks) - sum(map(sum, table))
    m = comp["mcnemar_recall"]
    assert (m["b"], m["c"]) == (table[0][1], table[1][0])
    exact = m["method"] == "exact binomial"
    ref = ct.mcnemar(np.array(table), exact=exact, correction=True)
    assert m["p_value"] == pytest.approx(ref.pvalue)
    assert comp["recall_difference"] == pytest.approx(fa.mean() - fb.mean())
    assert comp["a"]["recall"] == pytest.approx(res["screening"]["recall"])


def test_comparison_refuses_different_test_patches(evaluated, demo_run, tmp_path):
    import torch

    out, _ = demo_run
    a, _, _ = evaluated
    ws_copy = tmp_path / "ws"
    shutil.copytree(out / "workspace", ws_copy)
    ws = Workspace.open(ws_copy)
    test_crack = next(r for r in ws.patches() if r.subset == "test" and r.label != "none")
    ws.add_labels([(test_crack.id, "none")], reviewer="test")  # relabel one test patch
    other = _clone_experiment(out, tmp_path / "other")
    ckpt = torch.load(other / "checkpoint.pt", map_location="cpu", weights_only=True)
    ckpt["experiment"]["workspace"] = str(ws_copy)
    torch.save(ckpt, other / "checkpoint.pt")
    with pytest.raises(
        EvaluationError,
        match=r"evaluated patches differ \(0 only in the first, 0 only in the second, "
        r"1 with different labels\)",
    ):
        evaluate_experiment(a, against=other)


def test_bad_options_are_refused_before_any_work(tmp_path):
    with pytest.raises(EvaluationError, match=r"expected split 'test' or 'val', got 'train'"):
        evaluate_experiment(tmp_path, split="train")
    with pytest.raises(EvaluationError, match=r"expected confidence in \(0, 1\), got 95"):
        evaluate_experiment(tmp_path, confidence=95)
    with pytest.raises(ValueError, match=r"unknown interval method 'wald'"):
        evaluate_experiment(tmp_path, interval_method="wald")
    with pytest.raises(EvaluationError, match=r"expected require_recall in \[0, 1\], got 1.5"):
        evaluate_experiment(tmp_path, require_recall=1.5)


def test_gate_verdict_in_words(evaluated):
    _, _, res = evaluated
    gate, ci = res["gate"], res["screening"]["recall_interval"]
    assert gate["passed"] is True and gate["recall_lower_bound"] == ci["low"]
    assert gate["verdict"].startswith("ACCEPTED: the 95% lower bound of screening recall")
    assert f"{ci['k']}/{ci['n']} cracks found" in gate["verdict"]


def test_cli_prints_comparison_and_clopper_pearson(evaluated):
    from click.testing import CliRunner

    from trainkit.cli import cli

    a, b, _ = evaluated
    args = ["evaluate", str(a), "--against", str(b), "--interval", "clopper-pearson"]
    res = CliRunner().invoke(cli, [*args, "--require-recall", "1.0"])
    assert res.exit_code == 3, res.output
    text = " ".join(res.output.split())
    assert "clopper-pearson" in text and "McNemar" in text and "REFUSED" in text
    assert "specificity" in text and "not an inspection" in text
    m = json.loads((a / "evaluation/metrics.json").read_text())
    ci = m["screening"]["recall_interval"]
    ref = stats.binomtest(ci["k"], ci["n"]).proportion_ci(method="exact")  # Clopper-Pearson
    assert ci["method"] == "clopper-pearson"
    assert (ci["low"], ci["high"]) == pytest.approx((ref.low, ref.high))
    assert m["calibration"]["temperature"] is None  # not asked for this time


def test_report_renders_in_chromium_with_the_numbers_of_metrics_json(evaluated, tmp_path):
    """Open report.html in headless chromium; every tagged number must equal metrics.json."""
    import base64
    import io
    import subprocess
    from html.parser import HTMLParser

    from PIL import Image

    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:  # .ci/run installs it; a development machine needs it too
        pytest.fail("chromium is not installed (apt-get install chromium): the report is untested")
    a, _, _ = evaluated
    # Re-evaluate with every section (comparison, temperature, gate) so the page has all of them.
    res = evaluate_experiment(a, against=evaluated[1], temperature_scaling=True, require_recall=0.0)
    page = a / "evaluation/report.html"
    proc = subprocess.run(
        [
            chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
            "--no-first-run", "--disable-background-networking", "--disable-component-update",
            "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr",
            "--v=0", "--dump-dom", page.as_uri(),
        ],
        capture_output=True, text=True, timeout=120, check=False,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "Uncaught" not in proc.stderr and "CONSOLE" not in proc.stderr, proc.stderr[-2000:]

    class Spans(HTMLParser):
        def __init__(self):
            super().__init__()
            self.found, self.images, self._open = [], [], None

        def handle_starttag(self, tag, attrs):
            d = dict(attrs)
            if "data-metric" in d:
                self._open = [d["data-metric"], d["data-value"], ""]
            if tag == "img":
                self.images.append(d["src"])

        def handle_data(self, data):
            if self._open is not None:
                self._open[2] += data

        def handle_endtag(self, tag):
            if tag == "span" and self._open is not None:
                self.found.append(tuple(self._open))
                self._open = None

    dom = Spans()
    dom.feed(proc.stdout)
    assert "not an inspection" in proc.stdout and "licensed engineers" in proc.stdout
    assert res["workspace"] in proc.stdout and res["model"]["checkpoint"] in proc.stdout
    seen = {path for path, _, _ in dom.found}
    must = {"screening.recall", "screening.recall_ci_low", "screening.false_alarm_rate",
            "screening.specificity", "calibration.ece", "calibration.temperature.value",
            "comparison.mcnemar_recall.p_value", "per_class.0.recall", "confusion_matrix.0.0"}  # fmt: skip
    assert must <= seen
    for path, value, text in dom.found:
        node = res
        for part in path.split("."):
            node = node[int(part)] if isinstance(node, list) else node[part]
        if node is None:
            assert (value, text) == ("null", "n/a"), path
        elif isinstance(node, int):
            assert int(value) == node and text == str(node), path
        else:
            assert float(value) == node, path  # the exact value from metrics.json
            decimals = len(text.split(".")[1])
            assert abs(float(text) - node) <= 0.5 * 10**-decimals + 1e-12, path
    assert len(dom.images) >= 3  # confusion, curves, reliability (+ contact sheets)
    for src in dom.images:
        assert src.startswith("data:image/png;base64,")
        Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))).verify()


def test_threshold_from_a_false_alarm_budget_on_validation(evaluated, tmp_path):
    """--max-false-alarms: the validation false-alarm rate at the chosen threshold is within
    the budget, and the threshold is the lowest such (recomputed from the validation scores
    with scikit-learn's roc_curve: the best TPR with FPR <= budget is reached)."""
    from sklearn.metrics import roc_curve

    from trainkit.core.contract import screening_probability
    from trainkit.judging.evaluation import EvaluationOptions, _run_experiment

    a, _, _ = evaluated
    c = _clone_experiment(a, tmp_path / "c")
    res = evaluate_experiment(c, max_false_alarms=0.05)
    s = res["screening"]
    assert s["max_false_alarms"] == 0.05 and s["target_recall"] is None
    assert "false-alarm rate at most 0.05" in s["threshold_source"]
    assert s["validation"]["false_alarm_rate"] <= 0.05
    run = _run_experiment(c, EvaluationOptions(), None)
    y, p = run.val.labels != 0, screening_probability(run.val.probs)
    fpr, tpr, _ = roc_curve(y, p)
    assert s["validation"]["recall"] == pytest.approx(tpr[fpr <= 0.05 + 1e-12].max())
    html = (c / "evaluation" / "report.html").read_text(encoding="utf-8")
    assert "Allowing at most 5% false alarms on validation" in html


def test_the_threshold_carries_a_recall_promise_recomputed_with_scipy(evaluated):
    """The recall-target threshold is the k-th lowest validation crack score, k the largest
    with P(Beta(k, n + 1 - k) <= 1 - target) >= the confidence (scipy's beta distribution;
    order statistics of a continuous score), and the report says what it promises."""
    from scipy import stats

    from trainkit.core.contract import screening_probability
    from trainkit.judging.evaluation import EvaluationOptions, _run_experiment
    from trainkit.metrics import photo_design_effect

    a, _, res = evaluated
    s, pr = res["screening"], res["screening"]["promise"]
    run = _run_experiment(a, EvaluationOptions(), None)
    is_crack = run.val.labels != 0
    p = screening_probability(run.val.probs)[is_crack]
    crack = np.sort(p)
    n, target, conf = crack.size, s["target_recall"], pr["confidence"]
    assert pr["cracks"] == n and pr["target"] == target and conf == 0.9
    # the cracks counted for their photos (checked against scipy's ANOVA in
    # test_threshold_promise), then the order statistic of the beta law on those
    deff, _ = photo_design_effect(p, np.asarray(run.val.photos)[is_crack])
    m = max(1, int(np.floor(n / deff + 1e-9)))
    assert pr["effective_cracks"] == pytest.approx(n / deff, abs=1e-3)
    ok = [k for k in range(1, m + 1) if stats.beta.cdf(1 - target, k, m + 1 - k) >= conf]
    assert pr["kept"] == bool(ok)
    k = max(1, int(np.floor(max(ok) * n / m + 1e-9))) if ok else 1
    assert pr["below"] == k and pr["threshold"] == pytest.approx(crack[k - 1])
    assert s["threshold"] == pytest.approx(pr["threshold"]) == pr["operating_threshold"]
    html = (a / "evaluation" / "report.html").read_text(encoding="utf-8")
    assert ("promises recall" in html) if ok else ("NO RECALL PROMISE" in html)
    assert ("promised with confidence 0.9" in s["threshold_source"]) == bool(ok)
    assert pr["photo_correlation"] >= 0


def test_two_evaluations_of_one_experiment_at_once_both_finish_whole(evaluated, tmp_path):
    """Two `evaluate` processes on one experiment at the same time (say, an engineer trying
    another gate while a scheduled job runs): both finish, every file left is whole and
    is one of the two results, and no temporary file is left behind."""
    import subprocess
    import sys

    a, _, _ = evaluated
    c = _clone_experiment(a, tmp_path / "c")
    code = (
        "import sys; from trainkit.judging.evaluation import evaluate_experiment; "
        "evaluate_experiment(sys.argv[1], require_recall=float(sys.argv[2]))"
    )
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    procs = [
        subprocess.Popen([sys.executable, "-c", code, str(c), r], env=env, stderr=subprocess.PIPE)
        for r in ("0.0", "0.99")
    ]
    errors = [p.communicate(timeout=600)[1].decode() for p in procs]
    assert [p.returncode for p in procs] == [0, 0], errors
    ev = c / "evaluation"
    metrics = json.loads((ev / "metrics.json").read_text(encoding="utf-8"))
    assert metrics["gate"]["required_recall"] in (0.0, 0.99)
    assert (ev / "report.html").read_text(encoding="utf-8").rstrip().endswith("</html>")
    assert len(_rows(ev / "predictions.csv")) == metrics["patches"]
    assert sorted(p.name for p in ev.iterdir() if "tmp" in p.name) == []
