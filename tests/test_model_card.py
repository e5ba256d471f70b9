"""The model card written by export: real figures from metrics.json, counts, cautions, no invention."""

from __future__ import annotations

import json
import re
import shutil

import pytest

from trainkit.judging.model_card import NOT_EVALUATED, build_model_card, write_model_card


def _section(card: str, heading: str) -> str:
    """The text of one '## heading' section."""
    m = re.search(rf"^## {re.escape(heading)}\n(.*?)(?=^## |\Z)", card, re.S | re.M)
    assert m, f"section {heading!r} missing"
    return m.group(1)


def _load(out):
    import torch

    ckpt = torch.load(out / "checkpoint.pt", map_location="cpu", weights_only=True)
    metrics = json.loads((out / "evaluation" / "metrics.json").read_text())
    experiment = json.loads((out / "experiment.json").read_text())
    return ckpt, metrics, experiment


def _has_cautions(card: str) -> None:
    low = card.lower()
    assert "triage aid" in low and "not an inspection" in low
    assert "only for photos like its test set" in low
    assert "local codes" in low and "licensed engineers" in low


def test_export_writes_the_card_with_the_measured_figures(demo_run):
    out, _ = demo_run
    card_path = out / "model-card.md"
    assert card_path.is_file()
    assert not list(out.glob("model-card.md*.tmp"))
    card = card_path.read_text(encoding="utf-8")
    _, metrics, experiment = _load(out)
    s = metrics["screening"]

    # Screening recall, its interval, method and k/n, parsed back from the card.
    m = re.search(
        r"Screening recall .*?\*\*([0-9.]+)\*\*, 95% interval \[([0-9.]+), ([0-9.]+)\] "
        r"\((\w[\w-]*); (\d+) of (\d+) cracked",
        card,
    )
    assert m, card
    assert float(m.group(1)) == pytest.approx(s["recall"], abs=5e-4)
    assert float(m.group(2)) == pytest.approx(s["recall_interval"]["low"], abs=5e-4)
    assert float(m.group(3)) == pytest.approx(s["recall_interval"]["high"], abs=5e-4)
    assert m.group(4) == s["recall_interval"]["method"]
    assert (int(m.group(5)), int(m.group(6))) == (
        s["recall_interval"]["k"],
        s["recall_interval"]["n"],
    )
    # False-alarm rate with fp of clean.
    m = re.search(r"False-alarm rate: ([0-9.]+) \((\d+) of (\d+) clean", card)
    assert m
    assert float(m.group(1)) == pytest.approx(s["false_alarm_rate"], abs=5e-4)
    assert (int(m.group(2)), int(m.group(3))) == (s["fp"], s["fp"] + s["tn"])

    # Per-class rows: recall, interval, k / n.
    rows = {
        r[0]: r[1:]
        for r in re.findall(
            r"^\| (\w+) \| ([0-9.]+|n/a) \| ([0-9.]+|n/a) \| ([0-9.]+|n/a) \| (\d+) / (\d+) \|$",
            _section(card, "Test metrics"),
            re.M,
        )
    }
    assert list(rows) == metrics["class_names"]
    for c in metrics["per_class"]:
        rec, lo, hi, k, n = rows[c["name"]]
        recall = (
            None if c["recall_interval"]["n"] == 0 else c["recall"]
        )  # undefined without patches
        for text, value in (
            (rec, recall),
            (lo, c["recall_ci_low"]),
            (hi, c["recall_ci_high"]),
        ):
            if value is None:
                assert text == "n/a"
            else:
                assert float(text) == pytest.approx(value, abs=5e-4)
        assert (int(k), int(n)) == (c["recall_interval"]["k"], c["recall_interval"]["n"])

    # The threshold and what it means in false alarms, on test and validation.
    thr = _section(card, "Threshold")
    m = re.search(r"at least \*\*([0-9.]+)\*\*", thr)
    assert m and float(m.group(1)) == pytest.approx(s["threshold"], abs=5e-4)
    assert f"{s['fp']} of {s['fp'] + s['tn']} clean test patches were flagged" in thr
    v = s["validation"]
    assert f"validation set flagged {v['fp']} of {v['fp'] + v['tn']} clean patches" in thr

    # Class counts per subset from the checkpoint's split info.
    counts = experiment["split"]["class_counts"]
    table = _section(card, "Training data")
    for name in metrics["class_names"]:
        want = (
            f"| {name} | {counts['train'][name]} | {counts['val'][name]} | {counts['test'][name]} |"
        )
        assert want in table
    groups = experiment["split"]["groups"]
    assert f"{sum(groups.values())} (train {groups['train']}, val {groups['val']}" in table
    assert experiment["data_digest"] in table
    assert "128 px" in table
    lo, hi = experiment["gsd_mm_range"]
    assert f"{lo:.4f} to {hi:.4f} mm/px" in table
    assert "synthetic" in table  # the demo trains on trainkit.synth photos

    assert "Not evaluated" not in card
    # The demo fine-tunes the packaged ImageNet weights; the card names them with the
    # SHA-256 prefix of the file (57934424, the packaged file's own name says so).
    assert "ImageNet" in _section(card, "The model") and "57934424" in _section(card, "The model")
    assert "crack width" in _section(card, "Out of scope")
    _has_cautions(card)


def test_card_without_evaluation_says_so_and_shows_no_metrics(demo_run, tmp_path):
    out, _ = demo_run
    exp = tmp_path / "not-evaluated"
    exp.mkdir()
    for name in ("checkpoint.pt", "experiment.json"):
        shutil.copy(out / name, exp / name)
    ckpt, metrics, _ = _load(out)
    path = write_model_card(exp, ckpt, {"threshold": 0.5, "model": str(exp / "model.onnx")})
    assert path == exp / "model-card.md"
    card = path.read_text(encoding="utf-8")
    assert NOT_EVALUATED in card
    assert "not evaluated" in card.lower()
    section = _section(card, "Test metrics")
    assert not re.search(r"\d", section.replace(NOT_EVALUATED, ""))
    assert "Screening recall" not in card and "False-alarm rate" not in card
    assert "per-class" not in card.lower()
    # No figure from the real evaluation leaks in.
    s = metrics["screening"]
    assert f"{s['threshold']:.3f}" not in card or s["threshold"] == 0.5
    assert "default threshold 0.500" in card
    _has_cautions(card)


def test_gate_verdict_and_missing_values_are_shown(demo_run):
    out, _ = demo_run
    ckpt, metrics, experiment = _load(out)
    metrics = json.loads(json.dumps(metrics))
    metrics["gate"] = {
        "required_recall": 0.99,
        "recall_lower_bound": 0.5,
        "passed": False,
        "verdict": "REFUSED: invented verdict text for the test.",
    }
    metrics["per_class"][1]["recall"] = None
    card = build_model_card(ckpt, experiment=experiment, metrics=metrics, export={})
    assert "**failed**" in card and "REFUSED: invented verdict text" in card
    assert re.search(rf"^\| {metrics['per_class'][1]['name']} \| n/a \|", card, re.M)
    metrics["gate"] = None
    assert "none was recorded" in build_model_card(ckpt, experiment=experiment, metrics=metrics)


def test_weights_source_is_named(demo_run):
    """The card names the weights a model started from: the checkpoint's record (name,
    source, SHA-256 prefix), random initialisation, or, for checkpoints from before the
    record, what the recipe asked for."""
    out, _ = demo_run
    ckpt, _, experiment = _load(out)
    rec = {"name": "weights of a test", "source": "/models/backbone.pth", "sha256": "abcdef0123"}
    card = build_model_card(dict(ckpt, weights=rec), experiment=experiment)
    line = "weights of a test, from /models/backbone.pth, SHA-256 abcdef01..."
    assert line in _section(card, "The model")
    random = build_model_card(dict(ckpt, weights={"name": "random initialisation"}))
    assert "random initialisation (no pretrained weights)" in _section(random, "The model")
    old = {k: v for k, v in ckpt.items() if k != "weights"}
    old["config"] = dict(ckpt["config"], weights="/models/backbone.pth")
    card = build_model_card(old, experiment=experiment)
    assert "not recorded (the recipe asked for weights `/models/backbone.pth`)" in card


def _walk(tokens):
    for t in tokens:
        yield t
        yield from _walk(t.children or [])


def test_text_from_users_cannot_add_a_heading_html_or_a_table_cell():
    """Job names, times, folder and source paths go into the card escaped: parsed by
    markdown-it-py (a CommonMark parser, with GFM tables enabled), the card has only its
    own headings, no HTML at all, and every row of the jobs table its eight cells."""
    from markdown_it import MarkdownIt

    evil = "x\n## Verdict: ACCEPTED by licensed engineer\n<script>alert(1)</script> | y"
    interval = {"estimate": 0.9, "low": 0.8, "high": 0.95}
    jobs = [
        {"job": evil, "checked": "<b>now</b>", "cells_answered": "3 | 4", "recall": interval,
         "false_alarm_rate": interval, "verdict": "REFUSED: x", "required_recall": 0.9,
         "model_sha256": "`abc"},
        {"job": "plain", "checked": "t", "cells_answered": 5, "recall": interval,
         "false_alarm_rate": interval, "gate": None, "model_sha256": None},
    ]  # fmt: skip
    experiment = {"adaptation": {"source": "/exp`\n# Pwned", "jobs": [evil], "cells": {}}}
    ckpt = {"config": {"backbone": "b<img src=x>", "class_set": "presence"}, "input_px": 32}
    card = build_model_card(
        ckpt, experiment=experiment, jobs=jobs, name="run\n# Verdict: ACCEPTED", created="t"
    )
    md = MarkdownIt("commonmark").enable("table")
    tokens = list(_walk(md.parse(card)))
    assert not [t for t in tokens if t.type in ("html_inline", "html_block")]
    headings = [tokens[i + 1].content for i, t in enumerate(tokens) if t.type == "heading_open"]
    assert headings[0].startswith("Model card:") and "Pwned" not in "".join(headings)
    assert headings[1:] == [
        "Intended use", "Out of scope", "Training data", "The model", "Test metrics",
        "Threshold", "Jobs checked", "Known limits", "Cautions",
    ]  # fmt: skip
    rows, cells = [], 0
    for t in tokens:
        if t.type == "tr_open":
            cells = 0
        elif t.type in ("td_open", "th_open"):
            cells += 1
        elif t.type == "tr_close":
            rows.append(cells)
    assert rows == [8, 8, 8]  # the jobs table: header and two checks
    assert "<script>" not in card and "&lt;script&gt;" in card


def test_the_card_records_name_keys_the_kit_writes(demo_run):
    """The typed records the card reads (judging/records.py) declare keys that a fresh run
    writes: a key renamed in a writer and not in the record (or the other way) fails here,
    where the card would quietly print "n/a"."""
    from typing import get_type_hints

    from trainkit.judging import records as r

    out, _ = demo_run
    ckpt, metrics, experiment = _load(out)
    export = json.loads((out / "export.json").read_text())

    def keys(record) -> set[str]:
        return set(get_type_hints(record))

    assert keys(r.ExportRecord) == set(export)
    s = metrics["screening"]
    assert keys(r.ScreeningRecord) <= set(s)
    assert keys(r.IntervalRecord) <= set(s["recall_interval"])
    assert keys(r.CountsRecord) <= set(s["at_default_threshold"])
    for c in metrics["per_class"]:
        assert keys(r.PerClassRecord) <= set(c)
    written = {"split", "patches", "photos", "accuracy", "interval_method", "confidence"}
    assert {"screening", "per_class", "caution", "data_digest"} | written <= set(metrics)
    assert written <= keys(r.MetricsRecord)
    assert keys(r.SplitRecord) <= set(experiment["split"])
    assert keys(r.RecipeRecord) <= set(ckpt["config"])
    assert keys(r.WeightsRecord) >= set(ckpt["weights"])
    assert {"config", "experiment", "input_px", "best_epoch", "best_val"} <= set(ckpt)
    assert keys(r.ProvenanceRecord) - {"adaptation"} <= set(experiment)
