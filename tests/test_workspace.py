"""The SQLite store: label history, imports by place, WAL mode, splits without leaks."""

from __future__ import annotations

import sqlite3

import pytest
from _helpers import make_ws

from trainkit.core.errors import TrainkitNote
from trainkit.core.taxonomy import load_class_set
from trainkit.labels.splits import SplitError, assign_groups, check_no_leak, split_workspace
from trainkit.store.workspace import Workspace, WorkspaceError


def test_current_label_is_the_newest_event_and_history_is_kept(tmp_path):
    ws = make_ws(tmp_path / "ws", 3, 4, gsd_mm=0.5)
    pid = ws.patches()[0].id
    ws.add_labels([(pid, "vertical")], reviewer="ana")
    ws.add_labels([(pid, "map")], reviewer="ben")
    ws.add_labels([(pid, None)], reviewer="ana")  # unsure
    rec = next(r for r in ws.patches() if r.id == pid)
    assert rec.label is None and rec.labelled
    assert [e["label"] for e in ws.label_history(pid)] == ["vertical", "map", None]
    assert [e["reviewer"] for e in ws.label_history(pid)] == ["ana", "ben", "ana"]


def test_wal_mode_and_schema(tmp_path):
    ws = make_ws(tmp_path / "ws", 3, 4, gsd_mm=0.5)
    con = sqlite3.connect(ws.db_path)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    con.close()
    reopened = Workspace.open(ws.root)
    assert reopened.class_set.names[0] == "none" and reopened.tile_px == 32


def test_bad_labels_and_mismatched_workspace(tmp_path):
    ws = make_ws(tmp_path / "ws", 3, 4, gsd_mm=0.5)
    with pytest.raises(ValueError, match="unknown class 'crack'; choose one of: none, horizontal"):
        ws.add_labels([(1, "crack")], reviewer="x")
    with pytest.raises(ValueError, match="invalid label origin"):
        ws.add_labels([(1, "map")], reviewer="x", origin="guess")
    with pytest.raises(WorkspaceError, match="holds 32-px patches"):
        Workspace.create(ws.root, class_set=load_class_set("orientation"), tile_px=64)
    with pytest.raises(WorkspaceError, match="not a trainkit workspace"):
        Workspace.open(tmp_path / "nowhere")


def test_split_keeps_groups_together_and_is_seeded(tmp_path):
    ws = make_ws(tmp_path / "ws", 12, 4, gsd_mm=0.5)
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
    ws = make_ws(tmp_path / "ws", 2, 3, gsd_mm=0.5)
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
    ws = make_ws(tmp_path / "ws", 1, 2, gsd_mm=0.5)
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


def test_version_1_workspace_is_migrated_to_the_new_origin_words(tmp_path):
    # A version-1 workspace stored label origins in a `source` column with other words;
    # build one by hand from a new one (SQLite's own ALTER TABLE ... RENAME COLUMN).
    import sqlite3

    ws = make_ws(tmp_path / "ws", 3, 4, gsd_mm=0.5)
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[0], "none")], reviewer="ana")
    ws.add_labels([(ids[1], "map")], reviewer="ana", origin="file")
    ws.undo_label_event(ws.add_label_event(ids[2], "vertical", reviewer="ana", origin="suggestion"))
    con = sqlite3.connect(ws.db_path)
    with con:
        for table in ("label_events", "undone_label_events"):
            con.execute(f"ALTER TABLE {table} RENAME COLUMN origin TO source")
            con.execute(
                f"UPDATE {table} SET source = CASE source WHEN 'reviewer' THEN 'human' "
                "WHEN 'file' THEN 'imported' WHEN 'suggestion' THEN 'model-accepted' END"
            )
        con.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    con.close()
    with pytest.warns(TrainkitNote, match="upgraded to format 3"):
        again = Workspace.open(ws.root)
    assert [e["origin"] for e in again.label_events()] == ["reviewer", "file"]
    assert [e["origin"] for e in again.undone_events()] == ["suggestion"]
    assert again.meta("schema_version") == "3"  # then on through version 2 to 3


def test_patches_by_ids_and_labelled_equal_the_filtered_list(tmp_path):
    ws = make_ws(tmp_path / "ws", 3, 4)
    every = ws.patches()
    ids = [r.id for r in every]
    ws.add_labels([(ids[7], "map"), (ids[2], None)], reviewer="ana")
    ws.undo_label_event(ws.add_label_event(ids[4], "none", reviewer="ana"))
    every = ws.patches()
    assert ws.patches(labelled=True) == [r for r in every if r.labelled]
    want = {ids[9], ids[0], ids[5], 10**6}  # an unknown id is left out
    assert ws.patches(ids=want) == [r for r in every if r.id in want]
    assert ws.patches(ids=[]) == [] and ws.patch_ids() == set(ids)


def test_a_photos_patches_are_one_id_range_recorded_on_the_photo(tmp_path):
    # Patches are found by photo through this range (the rowid), not an index over all rows.
    ws = make_ws(tmp_path / "ws", 3, 5)
    with ws.connect() as con:
        for pid, first, last in con.execute("SELECT id, first_patch, last_patch FROM photos"):
            ids = [r[0] for r in con.execute("SELECT id FROM patches WHERE photo_id = ?", (pid,))]
            assert ids == list(range(first, last + 1)) and len(ids) == 5
        plan = " ".join(
            str(r)
            for r in con.execute(
                "EXPLAIN QUERY PLAN SELECT id FROM patches WHERE id BETWEEN 6 AND 10"
            )
        )
    assert "INTEGER PRIMARY KEY" in plan  # SQLite's own plan: a search by rowid, no scan


def test_queue_rows_are_the_records_a_queue_needs(tmp_path):
    from trainkit.labels.review import Session, build_queue

    ws = make_ws(tmp_path / "ws", 40, 10, skip=[4])  # 400 patches: longer than a read window
    ids = [r.id for r in ws.patches()]
    ws.add_labels([(ids[3], "map"), (ids[250], None)], reviewer="ana")
    every = ws.patches()
    for labelled in (False, True):
        rows = ws.queue_rows(labelled=labelled)
        want = [(r.id, r.labelled, r.review_skip, r.job) for r in every if r.labelled == labelled]
        assert [tuple(r) for r in rows] == want
        some = {ids[3], ids[250], *ids[100:400:7], 10**9}  # an unknown id is left out
        rows = ws.queue_rows(labelled=labelled, ids=some)
        assert [tuple(r) for r in rows] == [w for w in want if w[0] in some]
    queue = build_queue(ws.queue_rows(labelled=False), reviewer="bo")
    assert queue == build_queue(every, reviewer="bo")
    assert len(queue) == 400 - 40 - 2  # left out of review (column 4), labelled
    session = Session(ws, "bo", queue)
    by_id = {r.id: r for r in every}
    seen = []
    while (rec := session.current()) is not None:  # records come a window at a time
        assert rec == by_id[rec.id]
        seen.append(rec.id)
        session.skip()
        if len(seen) == len(queue):
            break
    assert seen == queue
