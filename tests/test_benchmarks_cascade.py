"""The pure helper of benchmarks/cascade.py that turns a scan into cell figures.

The benchmark itself (training, mosaic frames, timed scans) stays out of the suite; its
--quick run takes about two minutes on 2 cores.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import benchmark_module
from sklearn.metrics import confusion_matrix


@pytest.fixture(scope="module")
def cb():
    with benchmark_module("cascade") as module:
        yield module


def test_cell_figures_count_flags_against_truth(cb, tmp_path):
    """Two frames of 2 x 3 cells; ambiguous cells (-1) left out; counts checked with
    scikit-learn's confusion_matrix."""
    rng = np.random.default_rng(0)
    truth = {
        "a.jpg": np.array([[1, 0, -1], [0, 1, 0]], np.int8),
        "b.jpg": np.array([[0, 0, 1], [1, -1, 0]], np.int8),
    }
    lines, flags, trues = [], [], []
    for name, t in truth.items():
        p = rng.uniform(0, 1, t.shape).round(3)
        lines.append({"frame": f"/x/{name}", "cell_probabilities": p.tolist(), "threshold": 0.5,
                      "main_model_cells": 2, "cells": 6})  # fmt: skip
        keep = t.ravel() >= 0
        flags += list((p.ravel() >= 0.5)[keep])
        trues += list((t.ravel() == 1)[keep])
    (tmp_path / "frames.jsonl").write_text("".join(json.dumps(r) + "\n" for r in lines))
    got = cb.cell_figures(tmp_path, truth)
    tn, fp, fn, tp = confusion_matrix(trues, flags, labels=[False, True]).ravel()
    assert got["recall_k_n"] == [tp, tp + fn] and got["false_alarms_k_n"] == [fp, fp + tn]
    assert got["recall"] == pytest.approx(round(tp / (tp + fn), 4))
    assert got["main_model_cells_share"] == round(4 / 12, 4)
