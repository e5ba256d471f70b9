"""benchmarks/drawings.py: the truth as drawings, the truth's widths, and a --quick run.

The full run (60 photos; 100 photos of 12 megapixels) stays out of the suite.
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
from conftest import benchmark_module

from trainkit.synth import Crack


@pytest.fixture(scope="module")
def bench():
    with benchmark_module("drawings") as module:
        yield module


def test_the_truths_width_in_a_box_is_worked_by_hand(bench):
    # a crack from (0, 10) to (100, 10) widening from 2 to 4 px: over x 0..50 its width goes
    # from 2 to 3, a mean of 2.5 (by hand); the smallest is 2
    crack = Crack(np.array([[0.0, 10.0], [100.0, 10.0]]), np.array([2.0, 4.0]), "main", 1)
    mean, smallest = bench.truth_width([crack], (0, 0, 50, 20))
    assert mean == pytest.approx(2.5) and smallest == pytest.approx(2.0)
    assert bench.truth_width([crack], (0, 30, 50, 60)) is None


def test_the_drawings_carry_the_truths_cracks(bench, tmp_path):
    truth = {"height": 40, "width": 60, "cracks": [
        {"crack_id": 3, "kind": "main", "points": [[5.0, 20.0], [55.0, 21.0]], "widths": [2.0, 3.0]}
    ]}  # fmt: skip
    (tmp_path / "d" / "truth").mkdir(parents=True)
    (tmp_path / "d" / "truth" / "p.json").write_text(json.dumps(truth))
    out = bench.write_drawings(tmp_path / "d", tmp_path / "o")
    from PIL import Image

    mask = np.asarray(Image.open(out["mask"] / "p.png")) > 0
    assert mask[20, 30] and not mask[5, 30]  # on the crack, and well off it
    rows = list(csv.DictReader(out["csv"].open()))
    assert [(r["photo"], r["x"], r["width_px"]) for r in rows] == [
        ("p.jpg", "5.0", "2.0"), ("p.jpg", "55.0", "3.0")
    ]  # fmt: skip
    svg = (out["svg"] / "p.svg").read_text()
    assert 'viewBox="0 0 60 40"' in svg and "stroke-width:3.000" in svg


def test_a_quick_run_measures_every_figure(bench, tmp_path):
    assert bench.main([str(tmp_path), "--quick", "--quiet"]) == 0
    res = json.loads((tmp_path / "drawings.json").read_text())
    assert res["caution"].startswith("The screener is a triage aid, not an inspection")
    for kind in ("mask", "svg", "csv"):
        a = res["agreement"][kind]
        assert a["patches_generator_labels"] > 0 and 0 <= a["agreement"] <= 1
    run = res["timing"]["runs"]["1"]
    assert run["tiling_seconds"] > 0 and run["import_seconds"] > 0
    assert run["patches"] == 27  # 3 photos of 632 x 474 at 224 px: 3 rows x 3 columns
