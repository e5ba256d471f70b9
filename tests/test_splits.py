"""Grouped splits: groups never straddle subsets over random layouts, and near-duplicate
crops across subsets are reported, dropped on request and shown by `trainkit split`."""

from __future__ import annotations

import io
import re

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import event, given, settings
from hypothesis import strategies as st
from PIL import Image

from trainkit.cli import cli
from trainkit.core.taxonomy import load_class_set
from trainkit.labels.neardup import crop_hash
from trainkit.labels.splits import (
    SUBSETS,
    SplitError,
    _patch_subsets,
    assign_groups,
    check_no_leak,
    find_near_duplicates,
    split_workspace,
)
from trainkit.store.workspace import Workspace
from trainkit.synth import SynthOptions, generate_photo

TILE = 128


@st.composite
def layouts(draw):
    """1-20 groups of 1-6 patches each, random labels from 3 classes, fractions and seed."""
    n_groups = draw(st.integers(1, 20))
    sizes = draw(st.lists(st.integers(1, 6), min_size=n_groups, max_size=n_groups))
    groups = [f"g{k}" for k, n in enumerate(sizes) for _ in range(n)]
    labels = draw(
        st.lists(
            st.sampled_from(["none", "vertical", "map"]), min_size=len(groups), max_size=len(groups)
        )
    )
    test = draw(st.sampled_from([0.1, 0.2, 0.3]))
    val = draw(st.sampled_from([0.1, 0.15, 0.25]))
    seed = draw(st.integers(0, 1000))
    return labels, groups, test, val, seed


@settings(max_examples=60, deadline=None)
@given(layouts())
def test_a_group_never_lands_in_two_subsets(layout):
    labels, groups, test, val, seed = layout
    n_groups = len(set(groups))
    largest_class = max(labels.count(c) for c in set(labels))
    needed = max(2, round(1 / test))  # folds of StratifiedGroupKFold for the test share
    if n_groups < needed or largest_class < needed:
        event("too few groups or patches for the test fold")
        if n_groups < needed:
            match = f"for testing: that needs at least {needed} groups .*, got {n_groups};"
        else:
            match = f"for testing: .* of one class, the largest class has {largest_class};"
        with pytest.raises(SplitError, match=match):
            assign_groups(labels, groups, test_fraction=test, val_fraction=val, seed=seed)
        return
    try:
        out = assign_groups(labels, groups, test_fraction=test, val_fraction=val, seed=seed)
    except SplitError as exc:  # too little left beside the test fold for validation
        event("too few groups or patches left for the validation fold")
        m = re.search(
            r"for validation: that needs at least (\d+) .*, (?:got|the largest class has) (\d+)",
            str(exc),
        )
        assert m and int(m[2]) < int(m[1]), str(exc)
        return
    event("split made")
    assert set(out) == set(groups) and set(out.values()) <= set(SUBSETS)
    per_patch = _patch_subsets(labels, np.array(groups), test, val, seed)
    for g in set(groups):
        assert {str(s) for s, gg in zip(per_patch, groups, strict=True) if gg == g} == {out[g]}


# ----- near-duplicates in a workspace ---------------------------------------------------


def _jpeg_copy(a: np.ndarray) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format="JPEG", quality=75)
    buf.seek(0)
    with Image.open(buf) as im:
        return np.asarray(im.convert("RGB"))


def _add_photo(ws: Workspace, name: str, crops: list[np.ndarray], labels: list[str]) -> None:
    (ws.root / "patches" / name).mkdir(parents=True)
    patches = []
    for c, a in enumerate(crops):
        rel = f"patches/{name}/{c}.png"
        Image.fromarray(a).save(ws.root / rel)
        patches.append(
            {
                "row": 0,
                "col": c,
                "x0": TILE * c,
                "y0": 0,
                "x1": TILE * c + TILE,
                "y1": TILE,
                "crop": rel,
                "patch_mm": None,
                "focus": 50.0,
                "clipped": 0.0,
            }
        )
    ws.add_photo_with_patches(
        name=f"{name}.png",
        source_path=f"/x/{name}.png",
        width=TILE * len(crops),
        height=TILE,
        gsd_mm=None,
        group_id=name,
        sha256="0" * 64,
        patches=patches,
    )
    recs = [r for r in ws.patches() if r.photo == f"{name}.png"]
    ws.add_labels(zip([r.id for r in recs], labels, strict=True), reviewer="t")


@pytest.fixture(scope="module")
def near_ws(tmp_path_factory) -> Workspace:
    """Ten photos of different seeds (three crops each) and a photo 'copy' holding a
    JPEG copy of photo p0's first crop and p0's second crop cut one pixel further right."""
    ws = Workspace.create(
        tmp_path_factory.mktemp("near") / "ws",
        class_set=load_class_set("orientation"),
        tile_px=TILE,
    )
    names = ["none", "vertical", "map"]
    first = None
    for s in range(10):
        im = generate_photo(s, SynthOptions(height=256, width=3 * TILE + 1)).image
        crops = [im[:TILE, TILE * c : TILE * c + TILE] for c in range(3)]
        _add_photo(ws, f"p{s}", crops, names)
        if s == 0:
            first = im
    copies = [_jpeg_copy(first[:TILE, :TILE]), first[:TILE, TILE + 1 : 2 * TILE + 1]]
    _add_photo(ws, "copy", copies, names[:2])
    return ws


def _place(ws: Workspace, subset_of_photo: dict[str, str]) -> None:
    recs = ws.patches()
    ws.set_split({r.id: subset_of_photo[r.photo[:-4]] for r in recs}, {})


def test_near_duplicates_across_subsets_are_found_and_dropped(near_ws):
    ws = near_ws
    layout = {f"p{s}": ("train", "val", "test")[s % 3] for s in range(10)}
    _place(ws, {**layout, "copy": "test"})  # p0 is in train, its copies in test
    recs = {(r.photo, r.col): r for r in ws.patches()}
    expected = {
        (recs["p0.png", 0].id, recs["copy.png", 0].id),
        (recs["p0.png", 1].id, recs["copy.png", 1].id),
    }
    # The copies really are within the default distance (checked pair by pair).
    for c in (0, 1):
        ha, hb = (crop_hash(ws.root / recs[photo, c].crop) for photo in ("p0.png", "copy.png"))
        assert (ha ^ hb).bit_count() <= 6

    rep = find_near_duplicates(ws)
    found = {(e["a"]["id"], e["b"]["id"]) for e in rep["examples"]}
    assert found == expected and rep["total"] == 2
    assert rep["pairs"] == {"train-val": 0, "train-test": 2, "val-test": 0}
    assert rep["checked"] == 32 and rep["unreadable"] == 0
    assert ws.split_info()["near_duplicates"]["total"] == 2
    before = ws.summary()["splits"]

    rep = find_near_duplicates(ws, drop=True)
    assert rep["dropped"] == {"val": 0, "test": 2}
    assert rep["dropped_ids"] == sorted(b for _, b in expected)
    after = ws.summary()["splits"]  # the workspace's own count of assigned patches
    assert after == {**before, "test": before["test"] - 2}
    info = ws.split_info()
    assert info["patches"] == after and info["near_duplicates"]["dropped"]["test"] == 2
    assert {k: sum(v.values()) for k, v in info["class_counts"].items()} == after
    check_no_leak(ws.patches())
    assert find_near_duplicates(ws)["total"] == 0  # nothing left across subsets

    # Same photo pair split val/test: the test member goes; same subset: not a pair.
    _place(ws, {**layout, "p0": "val", "copy": "test"})
    assert find_near_duplicates(ws, drop=True)["dropped"] == {"val": 0, "test": 2}
    _place(ws, {**layout, "p0": "test", "copy": "test"})
    assert find_near_duplicates(ws)["total"] == 0


def test_unrelated_photos_give_no_pairs_and_missing_crops_are_counted(near_ws, tmp_path):
    ws = near_ws
    _place(ws, {**{f"p{s}": ("train", "val", "test")[s % 3] for s in range(10)}, "copy": "train"})
    rep = find_near_duplicates(ws)
    assert rep["total"] == 0 and rep["examples"] == []
    empty = Workspace.create(tmp_path / "e", class_set=load_class_set("orientation"), tile_px=TILE)
    with pytest.raises(SplitError, match="has no split to check; run `trainkit split` first"):
        find_near_duplicates(empty)
    crop = ws.root / ws.patches()[0].crop
    saved = crop.read_bytes()
    crop.unlink()
    try:
        assert find_near_duplicates(ws)["unreadable"] == 1
    finally:
        crop.write_bytes(saved)


def test_split_command_prints_and_drops_near_duplicates(near_ws):
    ws = near_ws
    # A seed whose split puts p0 and its copies on different sides (found, not chosen).
    for seed in range(50):
        split_workspace(ws, seed=seed)
        subset = {r.photo: r.subset for r in ws.patches()}
        if subset["p0.png"] != subset["copy.png"]:
            break
    else:
        pytest.fail("no seed in 0..49 separates p0 from its copies")
    res = CliRunner().invoke(cli, ["split", str(ws.root), "--seed", str(seed)])
    assert res.exit_code == 0, res.output
    assert "Near-duplicates across subsets (pHash within 6 of 64 bits): 2 pair(s)" in res.output
    assert "--drop-near-duplicates takes the val/test member" in res.output
    res = CliRunner().invoke(
        cli, ["split", str(ws.root), "--seed", str(seed), "--drop-near-duplicates"]
    )
    assert res.exit_code == 0, res.output
    assert "took 2 patch(es) out of the split" in res.output
    assert ws.split_info()["near_duplicates"]["dropped_ids"]
    res = CliRunner().invoke(
        cli, ["split", str(ws.root), "--seed", str(seed), "--near-duplicate-bits", "0"]
    )
    assert res.exit_code == 0 and "within 0 of 64 bits" in res.output
    assert ws.split_info()["near_duplicates"]["max_distance"] == 0
