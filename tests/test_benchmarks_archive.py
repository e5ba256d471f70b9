"""benchmarks/archive.py: the synthetic archive, the figures' arithmetic and a --quick run.

The full run (12-megapixel photos, 100 / 500 / 2,000 of them) stays out of the suite;
these use photos of a few megapixels at most. No timing is asserted: only counts, the
arithmetic that turns measurements into figures, and the verdicts against the targets.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import subprocess
import sys
import time

import cv2
import numpy as np
import pytest
from conftest import benchmark_module


@pytest.fixture(scope="module")
def arc():
    with benchmark_module("archive") as module:
        yield module


def test_photo_size_is_4_by_3_at_the_asked_megapixels(arc):
    # 12 MP at 4:3 is 4000 x 3000 (12.0 MP), the photo size.
    assert arc.photo_size(12) == (3000, 4000)
    h, w = arc.photo_size(0.2)
    assert w * 3 == h * 4 and abs(h * w / 0.2e6 - 1) < 0.02
    with pytest.raises(ValueError, match="megapixels"):
        arc.photo_size(0)


def test_archive_files_are_distinct_by_sha256_and_derived_in_pixels(arc, tmp_path):
    made = arc.make_archive(tmp_path / "a", 6, megapixels=0.2, made=2)
    paths = made["paths"]
    # Outside count: hashlib over the files as they lie on disk, and os.path.getsize.
    digests = {hashlib.sha256(p.read_bytes()).hexdigest() for p in paths}
    assert len(digests) == 6 == made["distinct_sha256"]
    assert made["bytes"] == sum(os.path.getsize(p) for p in paths)
    # Photo 2 is derived from photo 0 (variant 1: a left-right flip, shifted 7 and 13 px,
    # 4 grey levels darker): decoded, it matches that transform of photo 0 within JPEG
    # error, and differs from photo 0 itself.
    p0 = cv2.imread(str(paths[0])).astype(float)
    p2 = cv2.imread(str(paths[2])).astype(float)
    expected = np.roll(p0[:, ::-1], (7, 13), axis=(0, 1)) - 4
    assert np.mean(np.abs(p2 - np.clip(expected, 0, 255))) < 3.0
    assert np.mean(np.abs(p2 - p0)) > 3 * np.mean(np.abs(p2 - np.clip(expected, 0, 255)))


def test_folder_usage_matches_os_walk(arc, tmp_path):
    (tmp_path / "a" / "b").mkdir(parents=True)
    (tmp_path / "a" / "x.bin").write_bytes(b"1" * 1000)
    (tmp_path / "a" / "b" / "y.bin").write_bytes(b"2" * 37)
    walked = [os.path.join(d, f) for d, _, files in os.walk(tmp_path) for f in files]
    assert (
        arc.folder_usage(tmp_path)
        == (sum(map(os.path.getsize, walked)), len(walked))
        == (
            1037,
            2,
        )
    )


def test_line_fit_matches_a_hand_worked_example_and_scipy(arc):
    from scipy.stats import linregress

    # By hand: x = 1, 2, 3 and y = 1, 3, 2. Means 2 and 2; Sxy = (-1)(-1) + 0 + (1)(0) = 1,
    # Sxx = 2, so slope 0.5 and intercept 2 - 0.5 * 2 = 1; fitted 1.5, 2, 2.5; residuals
    # -0.5, 1, -0.5 (relative to y: -0.5, 1/3, -0.25); R^2 = 1 - 1.5 / 2 = 0.25.
    fit = arc.line_fit([1, 2, 3], [1.0, 3.0, 2.0])
    assert fit["slope"] == pytest.approx(0.5)
    assert fit["intercept"] == pytest.approx(1.0)
    assert fit["residuals"] == pytest.approx([-0.5, 1.0, -0.5])
    assert fit["relative_residuals"] == pytest.approx([-0.5, 1 / 3, -0.25])
    assert fit["max_abs_relative_residual"] == pytest.approx(0.5)
    assert fit["r2"] == pytest.approx(0.25)
    assert arc.at(fit, 40_000) == pytest.approx(0.5 * 40_000 + 1)
    # The benchmark's sizes with a fixed cost and a little noise, against scipy's linregress.
    x = [100, 500, 2000]
    y = [31.0 + 0.21 * n + e for n, e in zip(x, (0.8, -1.9, 0.6), strict=True)]
    ref = linregress(x, y)
    fit = arc.line_fit(x, y)
    assert fit["slope"] == pytest.approx(ref.slope)
    assert fit["intercept"] == pytest.approx(ref.intercept)
    assert fit["r2"] == pytest.approx(ref.rvalue**2)
    # One size: a line through the origin (cost proportional to photos), nothing to judge.
    one = arc.line_fit([20], [3.0])
    assert arc.at(one, 40) == pytest.approx(6.0) and one["r2"] is None


def test_verdicts_compare_each_figure_with_its_target(arc):
    assert arc.verdict("workspace_share_of_archive", 0.019)["met"] is True
    assert arc.verdict("workspace_share_of_archive", 0.021)["met"] is False
    assert arc.verdict("decode_bound_share", 0.7)["met"] is True  # the bound itself is met
    assert arc.verdict("speedup_2_vs_1", 1.69)["met"] is False
    assert arc.verdict("crop_store_bytes_per_labelled_patch", 60_000)["met"] is True
    assert arc.verdict("crop_store_bytes_per_labelled_patch", 60_001)["met"] is False
    assert arc.verdict("status_cli_seconds", None)["met"] is None  # not measured: no verdict
    v = arc.verdict("peak_mb", 1200.0)
    assert v["met"] is False and "1 GB" in v["target"]
    with pytest.raises(KeyError):
        arc.verdict("no_such_figure", 1.0)


_ALLOCATING = """
import subprocess, sys, time
import numpy as np
mb = int(sys.argv[1])
block = np.ones(mb * 2**20, np.uint8)  # touched: resident
if len(sys.argv) > 2:
    child = subprocess.Popen([sys.executable, "-c", sys.argv[2], sys.argv[3]])
    time.sleep(2.5)
    child.wait()
else:
    time.sleep(2.0)
"""


def test_tree_memory_adds_up_the_process_and_its_descendants(arc):
    # A process holding 120 MB starts one holding 80 MB; both stay resident about 2 s.
    # The kernel's own VmRSS of each (read from /proc) must add up in the sampled peak,
    # and no single process reaches the sum.
    proc = subprocess.Popen([sys.executable, "-c", _ALLOCATING, "120", _ALLOCATING, "80"])
    with arc.TreeMemory(proc.pid, interval=0.05) as mem:
        proc.wait()
    got = mem.result()
    assert got["processes_seen"] >= 2
    assert got["peak_total_mb"] >= 200
    # each process's own high-water mark (VmHWM), added up: never below the sampled sum
    assert got["peak_hwm_sum_mb"] >= got["peak_total_mb"]
    assert 120 <= got["peak_single_mb"] < got["peak_total_mb"]
    # the tree's figure with a process's final VmHWM known from elsewhere (a short peak
    # after the last sample): that process's part is raised to it, the others kept
    # (the 120-MB process is the largest, so its mark is peak_single_mb)
    raised = mem.result(own_hwm_mb=got["peak_single_mb"] + 50)
    assert raised["peak_hwm_sum_mb"] == pytest.approx(got["peak_hwm_sum_mb"] + 50, abs=0.2)
    assert mem.result(own_hwm_mb=1.0)["peak_hwm_sum_mb"] == got["peak_hwm_sum_mb"]


def test_tree_memory_of_a_finished_process_is_empty(arc):
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    time.sleep(0.1)
    with arc.TreeMemory(proc.pid, interval=0.05) as mem:
        pass
    assert mem.result()["samples"] == 0


def test_a_measurement_process_takes_an_archive_sized_argument(arc):
    # 2,000 paths of a scratch folder are about 170 KB of JSON, more than Linux lets one
    # command-line argument hold (MAX_ARG_STRLEN, 128 KiB; execve(2)).
    paths = [
        f"/tmp/scratch/trainkit-archive-x/archive/job00/frame_{i:05d}.jpg" for i in range(3000)
    ]
    got = arc._child(
        "import json, sys; print(json.dumps({'n': len(json.loads(sys.stdin.read()))}))", paths
    )
    assert got["n"] == 3000


def test_quick_run_figures_follow_from_the_measurements(arc, tmp_path):
    out = tmp_path / "out"
    assert arc.main([str(out), "--quick", "--quiet", "--scratch", str(tmp_path)]) == 0
    result = json.loads((out / "archive.json").read_text())
    assert result["caution"].startswith("The screener is a triage aid")
    assert result["photo_sizes_measured"] == [6, 12]
    h, w = result["archive"]["height"], result["archive"]["width"]
    assert (h, w) == (1224, 1632)  # 2 MP at 4:3
    # The kit's grid (trainkit.core.grid: no overlap, the last tile shifted inward) has
    # ceil(h / 128) x ceil(w / 128) patches per photo: 10 x 13 = 130, worked by hand.
    per_photo = math.ceil(h / 128) * math.ceil(w / 128)
    assert per_photo == 130
    for row in result["sizes"]:
        n = row["photos"]
        bound = row["decode_seconds"] / n
        assert row["decode_s_per_photo"] == pytest.approx(bound, rel=1e-3)
        assert set(row["tiling"]) == {"1", "2"}
        for k, t in row["tiling"].items():
            assert t["workers"] == int(k)
            assert t["patches"] == n * per_photo
            assert t["s_per_photo"] == pytest.approx(t["seconds"] / n, rel=1e-3)
            assert t["decode_bound_share"] == pytest.approx(bound / (t["seconds"] / n), rel=2e-3)
            # per process: the bound against the wall time of one photo times the workers
            assert t["decode_bound_share_per_process"] == pytest.approx(
                bound / (t["seconds"] * t["workers"] / n), rel=2e-3
            )
            assert t["workspace_bytes_per_photo"] == pytest.approx(t["workspace_bytes"] / n, abs=1)
            assert t["workspace_files_per_photo"] == pytest.approx(
                t["workspace_files"] / n, abs=0.01
            )
            assert t["workspace_share_of_archive"] == pytest.approx(
                t["workspace_bytes"] / row["archive_bytes"], rel=1e-3
            )
            # the tree's high-water marks include the tiling process's own (its final
            # VmHWM), so the figure is at least that; worker processes come on top
            assert t["peak_tree_mb"] >= t["peak_tiling_process_mb"]
            assert t["peak_tree_mb"] >= t["peak_tree_sampled_mb"]
            assert t["peak_tree_processes_seen"] >= 1
        assert row["speedup_2_vs_1"] == pytest.approx(
            row["tiling"]["1"]["seconds"] / row["tiling"]["2"]["seconds"], rel=2e-3
        )
        assert row["status"]["cli_seconds"] > row["status"]["library_seconds"] > 0
        assert row["review"]["first_patch_seconds"] > 0
        assert row["review"]["patch_shape"] == [128, 128, 3]
    # labelled patches: picked (crops cut and cached then), labelled, the crop store's
    # bytes over the labelled patches
    lab = result["labelled"]
    assert lab["photos"] == 12 and lab["picked"] == lab["patches"] == 40
    assert lab["pick_cached"] >= 39  # review's first patch before the pick may be one of them
    assert lab["cut_after_labelling"] == 0  # every labelled crop was cached by the pick
    assert lab["crop_store_crops"] >= 40
    assert lab["crop_store_bytes_per_labelled_patch"] == pytest.approx(
        lab["crop_store_bytes"] / lab["patches"], abs=1
    )
    assert lab["review_queue_length"] >= 40  # picked patches lead the queue
    # the linear fit and the extrapolation use the rows' totals
    sizes = [r["photos"] for r in result["sizes"]]
    lin = result["linearity"]["tiling_seconds_run_1"]
    ys = [r["tiling"]["1"]["seconds"] for r in result["sizes"]]
    slope = (ys[1] - ys[0]) / (sizes[1] - sizes[0])  # two points: the line through them
    assert lin["slope"] == pytest.approx(slope, rel=1e-3)
    assert lin["residuals"] == pytest.approx([0, 0], abs=1e-3)
    e = result["extrapolated"]
    assert e["photos"] == 40_000 and "not measured" in e["note"]
    # a wait is never extrapolated below what was measured
    assert e["status_cli_seconds"] >= max(r["status"]["cli_seconds"] for r in result["sizes"])
    assert e["tiling_hours_run_1"] == pytest.approx(
        (ys[0] + slope * (40_000 - sizes[0])) / 3600, rel=1e-3, abs=1e-3
    )
    # each verdict says what was compared and agrees with its figure
    for v in result["verdicts"]:
        if v["met"] is not None:
            assert v["met"] == arc.verdict(v["figure"], v["value"])["met"]
    assert {v["figure"] for v in result["verdicts"]} >= {
        "workspace_share_of_archive",
        "decode_bound_share",
        "speedup_2_vs_1",
        "peak_mb",
        "status_cli_seconds",
        "crop_store_bytes_per_labelled_patch",
        "linear_in_photos",
    }
    assert not any(tmp_path.glob("trainkit-archive-*"))  # the scratch folder is removed
