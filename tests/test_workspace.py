"""The SQLite store: label history, imports by place, WAL mode, splits without leaks."""

from __future__ import annotations

import sqlite3

import pytest

from trainkit.core.taxonomy import load_class_set
from trainkit.labels.splits import SplitError, assign_groups, check_no_leak, split_workspace
from trainkit.labels.workspace import Workspace, WorkspaceError, import_labels_csv


def make_ws(tmp_path, n_photos=3, per_photo=4):
    ws = Workspace.create(tmp_path / "ws", class_set=load_class_set("orientation"), tile_px=32)
    for i in range(n_photos):
        ws.add_photo_with_patches(
            name=f"p{i}.jpg",
            source_path=f"/x/p{i}.jpg",
            width=128,
            height=32,
            gsd_mm=0.5,
            group_id=f"g{i}",
            sha256="0" * 64,
            patches=[
                {
                    "row": 0,
                    "col": c,
                    "x0": 32 * c,
                    "y0": 0,
                    "x1": 32 * c + 32,
                    "y1": 32,
                    "crop": f"patches/p{i}/{c}.png",
                    "patch_mm": 16.0,
                    "focus": 50.0,
                    "clipped": 0.0,
                }
                for c in range(per_photo)
            ],
        )
    return ws


def test_current_label_is_the_newest_event_and_history_is_kept(tmp_path):
    ws = make_ws(tmp_path)
    pid = ws.patches()[0].id
    ws.add_labels([(pid, "vertical")], reviewer="ana")
    ws.add_labels([(pid, "map")], reviewer="ben")
    ws.add_labels([(pid, None)], reviewer="ana")  # unsure
    rec = next(r for r in ws.patches() if r.id == pid)
    assert rec.label is None and rec.labelled
    assert [e["label"] for e in ws.label_history(pid)] == ["vertical", "map", None]
    assert [e["reviewer"] for e in ws.label_history(pid)] == ["ana", "ben", "ana"]


def test_wal_mode_and_schema(tmp_path):
    ws = make_ws(tmp_path)
    con = sqlite3.connect(ws.db_path)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    con.close()
    reopened = Workspace.open(ws.root)
    assert reopened.class_set.names[0] == "none" and reopened.tile_px == 32


def test_bad_labels_and_mismatched_workspace(tmp_path):
    ws = make_ws(tmp_path)
    with pytest.raises(ValueError, match="unknown class 'crack'; choose one of: none, horizontal"):
        ws.add_labels([(1, "crack")], reviewer="x")
    with pytest.raises(ValueError, match="invalid label source"):
        ws.add_labels([(1, "map")], reviewer="x", source="guess")
    with pytest.raises(WorkspaceError, match="holds 32-px patches"):
        Workspace.create(ws.root, class_set=load_class_set("orientation"), tile_px=64)
    with pytest.raises(WorkspaceError, match="not a trainkit workspace"):
        Workspace.open(tmp_path / "nowhere")


def test_import_labels_by_place(tmp_path):
    ws = make_ws(tmp_path)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,vertical\np0.jpg,32,0,64,32,\n")
    assert import_labels_csv(ws, csv_path) == 2
    recs = ws.patches()
    assert recs[0].label == "vertical" and recs[1].labelled and recs[1].label is None
    for bad, match in [
        ("photo,x0,y0,x1,y1,label\n../p0.jpg,0,0,32,32,none\n", "relative name inside"),
        ("photo,x0,y0,x1,y1,label\n/etc/p0.jpg,0,0,32,32,none\n", "relative name inside"),
        ("photo,x0,y0,x1,y1,label\nsub/p0.jpg,0,0,32,32,none\n", "no patch"),
        ("photo,x0,y0,x1,y1,label\np0.jpg,1,0,33,32,none\n", "no patch"),
        ("photo,x0,y0,x1,y1,label\np0.jpg,0,0,32,32,cracked\n", "unknown class"),
        ("photo,label\np0.jpg,none\n", "expected columns"),
    ]:
        csv_path.write_text(bad)
        with pytest.raises(WorkspaceError, match=match):
            import_labels_csv(ws, csv_path)
    # refused files add nothing
    assert sum(len(ws.label_history(r.id)) for r in ws.patches()) == 2


def test_split_keeps_groups_together_and_is_seeded(tmp_path):
    ws = make_ws(tmp_path, n_photos=12, per_photo=4)
    names = ["none", "vertical", "map", "none"]
    ws.add_labels([(r.id, names[r.col]) for r in ws.patches()], reviewer="t")
    rep = split_workspace(ws, seed=3)
    check_no_leak(ws.patches())
    assert sum(rep["groups"].values()) == 12 and all(
        rep["groups"][s] >= 1 for s in ("train", "val", "test")
    )
    first = {r.id: r.subset for r in ws.patches()}
    split_workspace(ws, seed=3)
    assert {r.id: r.subset for r in ws.patches()} == first


def test_status_counts(tmp_path):
    ws = make_ws(tmp_path, n_photos=2, per_photo=3)
    recs = ws.patches()
    ws.add_labels([(recs[0].id, "map"), (recs[1].id, None), (recs[2].id, "none")], reviewer="t")
    info = ws.summary()
    assert info["photos"] == 2 and info["patches"] == 6 and info["flagged"] == 0
    assert info["labeled"]["map"] == 1 and info["labeled"]["none"] == 1 and info["unsure"] == 1
    assert info["unlabeled"] == 3 and info["splits"] == {"train": 0, "val": 0, "test": 0}


def test_too_few_groups_is_a_clear_error():
    with pytest.raises(SplitError, match="needs at least 5 groups"):
        assign_groups(["none", "map", "none"], ["a", "b", "c"], test_fraction=0.2)


def test_leak_is_refused(tmp_path):
    ws = make_ws(tmp_path, n_photos=1, per_photo=2)
    recs = ws.patches()
    ws.add_labels([(r.id, "none") for r in recs], reviewer="t")
    ws.set_split({recs[0].id: "train", recs[1].id: "test"}, {})
    with pytest.raises(
        SplitError, match="1 group\\(s\\) appear in more than one subset \\(g0 in test\\+train\\)"
    ):
        check_no_leak(ws.patches())


def test_assign_groups_matches_sklearn_group_rule():
    """Cross-check with scikit-learn's own GroupKFold-style guarantee: no group in two folds."""
    labels = ["none"] * 30 + ["map"] * 10
    groups = [f"g{i % 10}" for i in range(40)]
    out = assign_groups(labels, groups, seed=1)
    assert set(out) == {f"g{i}" for i in range(10)}
    assert set(out.values()) <= {"train", "val", "test"}
