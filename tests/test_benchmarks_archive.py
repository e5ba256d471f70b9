"""benchmarks/archive.py: the synthetic archive, the workspace census and a --quick run.

The full run (12-megapixel photos, 20 and 60 of them) stays out of the suite; these use
photos of a fraction of a megapixel.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import sqlite3

import cv2
import numpy as np
import pytest
from conftest import benchmark_module

from trainkit.core.taxonomy import load_class_set
from trainkit.intake.tiling import tile_into_workspace
from trainkit.store.workspace import DB_NAME, Workspace


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


def test_folder_usage_matches_os_walk_and_the_patch_table(arc, tmp_path):
    made = arc.make_archive(tmp_path / "a", 2, megapixels=0.2, made=1)
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("presence"), tile_px=128)
    tile_into_workspace(made["paths"], ws, workers=1)
    n_bytes, n_files = arc.folder_usage(ws.root)
    walked = [os.path.join(d, f) for d, _, files in os.walk(ws.root) for f in files]
    assert (n_bytes, n_files) == (sum(os.path.getsize(f) for f in walked), len(walked))
    # One crop file per patch today (sqlite3, the standard library, reads the table).
    with sqlite3.connect(ws.root / DB_NAME) as db:
        patches = db.execute("SELECT COUNT(*) FROM patches").fetchone()[0]
    assert sum(f.endswith(".tiff") for f in walked) == patches


def test_extrapolation_is_the_least_squares_line(arc):
    # Two points (10, 5) and (30, 13): slope 0.4, intercept 1 -> 0.4 * 40000 + 1 = 16001.
    assert arc.extrapolate([10, 30], [5.0, 13.0]) == pytest.approx(16001.0)
    assert arc.extrapolate([20], [3.0], to=40) == pytest.approx(6.0)


def test_quick_run_counts_the_grid_and_the_archive(arc, tmp_path):
    out = tmp_path / "out"
    assert (
        arc.main(
            [str(out), "--quick", "--photos", "3", "--megapixels", "0.2", "--quiet"]
            + ["--scratch", str(tmp_path)]
        )
        == 0
    )
    result = json.loads((out / "archive.json").read_text())
    assert result["caution"].startswith("The screener is a triage aid")
    h, w = result["archive"]["height"], result["archive"]["width"]
    (row,) = result["sizes"]
    # The kit's grid (trainkit.core.grid: no overlap, the last tile shifted inward) has
    # ceil(h / 128) x ceil(w / 128) patches per photo, worked by hand here.
    per_photo = math.ceil(h / 128) * math.ceil(w / 128)
    for t in row["tiling"].values():
        assert t["patches"] == 3 * per_photo
        # crops plus the database files, so at least one file per patch
        assert t["workspace_files"] >= t["patches"]
        assert t["workspace_share_of_archive"] == pytest.approx(
            t["workspace_bytes"] / row["archive_bytes"], rel=1e-3
        )
    assert set(row["tiling"]) == {"1", "2", "2p"}
    assert row["tiling"]["2p"]["parallel"] == "processes"
    assert row["speedup_2p_vs_1"] > 0
    assert result["extrapolated"]["photos"] == 40_000
    assert not any(tmp_path.glob("trainkit-archive-*"))  # the scratch folder is removed
