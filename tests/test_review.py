"""Review logic: queue order, sheet answers, session undo/skip, agreement, conflicts, concurrency."""

from __future__ import annotations

import sqlite3
import subprocess
import sys

import numpy as np
import pytest
from _helpers import make_ws
from PIL import Image

from trainkit.core.taxonomy import load_class_set
from trainkit.labels.review import (
    ReviewError,
    Session,
    SheetAnswerError,
    agreement,
    build_queue,
    find_conflicts,
    margins,
    parse_sheet_answer,
)
from trainkit.store.workspace import Workspace, WorkspaceError

CS = load_class_set("orientation")


def grey(i, c):
    """Crop c of the workspaces here: a flat 16-px square, 10 grey levels per column."""
    return np.full((16, 16, 3), 10 * c, np.uint8)


def events_from_table(table, labels):
    """Label events of reviewers a and b reproducing a confusion table (rows a, columns b)."""
    events, pid, eid = [], 0, 0
    for i, row in enumerate(table):
        for j, count in enumerate(row):
            for _ in range(count):
                pid += 1
                for rev, lab in (("a", labels[i]), ("b", labels[j])):
                    eid += 1
                    events.append(dict(id=eid, patch_id=pid, label=lab, reviewer=rev, settles=None))
    return events


# ----- agreement -------------------------------------------------------------------------------------


def test_kappa_textbook_2x2_example():
    # [[20, 5], [10, 15]], n = 50: p_o 0.70, p_e 0.50, kappa 0.40 (common textbook example;
    # computed with sklearn cohen_kappa_score, shared REFERENCES).
    from sklearn.metrics import cohen_kappa_score

    cs = load_class_set("presence")
    ev = events_from_table([[20, 5], [10, 15]], ["none", "crack"])
    (pair,) = agreement(ev, cs)
    assert pair["reviewers"] == ("a", "b") and pair["n"] == 50
    assert pair["kappa"] == pytest.approx(0.40)
    assert pair["observed_agreement"] == pytest.approx(0.70)
    assert pair["confusion"] == [[20, 5], [10, 15]]
    a = [e["label"] for e in ev if e["reviewer"] == "a"]
    b = [e["label"] for e in ev if e["reviewer"] == "b"]
    assert pair["kappa"] == pytest.approx(cohen_kappa_score(a, b))


def test_kappa_published_3x3_example():
    # [[7, 1, 0], [0, 8, 0], [0, 0, 2]], n = 18: kappa = 29/32 = 0.906 (PMC2648993, Table 2).
    labels = ["none", "vertical", "map"]
    (pair,) = agreement(events_from_table([[7, 1, 0], [0, 8, 0], [0, 0, 2]], labels), CS)
    assert pair["kappa"] == pytest.approx(29 / 32)
    # crack vs none: [[7, 1], [0, 10]] -> kappa checked against sklearn directly
    from sklearn.metrics import cohen_kappa_score

    a = ["none"] * 8 + ["crack"] * 10
    b = ["none"] * 7 + ["crack"] * 11
    assert pair["kappa_crack_vs_none"] == pytest.approx(cohen_kappa_score(a, b))


def test_agreement_uses_each_reviewers_latest_own_label_and_skips_settlements():
    ev = [
        dict(id=1, patch_id=1, label="none", reviewer="a", settles=None),
        dict(id=2, patch_id=1, label="map", reviewer="a", settles=None),  # a changed their mind
        dict(id=3, patch_id=1, label="map", reviewer="b", settles=None),
        dict(id=4, patch_id=2, label="none", reviewer="a", settles=None),
        dict(id=5, patch_id=2, label="vertical", reviewer="b", settles=None),
        dict(
            id=6, patch_id=2, label="vertical", reviewer="c", settles="a,b"
        ),  # settler: not a rater
    ]
    (pair,) = agreement(ev, CS)
    assert pair["n"] == 2 and pair["observed_agreement"] == 0.5


def test_conflicts_and_their_settlement(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=16, crop=grey)
    ws.add_labels([(1, "vertical"), (2, "none"), (3, "map")], reviewer="ana")
    ws.add_labels([(1, "map"), (2, "none"), (3, None)], reviewer="ben")  # unsure does not conflict
    assert find_conflicts(ws.label_events()) == {1: {"ana": "vertical", "ben": "map"}}
    queue = build_queue(ws.patches(), reviewer="cy", queue="conflicts", events=ws.label_events())
    assert queue == [1]
    s = Session(ws, "cy", queue, settles={1: ["ana", "ben"]})
    s.answer("map")
    ev = ws.label_events()
    assert ev[-1]["settles"] == "ana,ben" and ev[-1]["reviewer"] == "cy"
    assert find_conflicts(ev) == {}
    ws.add_labels([(1, "horizontal")], reviewer="ana")  # a new disagreement after the settlement
    assert list(find_conflicts(ws.label_events())) == [1]


# ----- queue order ---------------------------------------------------------------------------------


def test_margins():
    p = np.array([[0.5, 0.3, 0.2], [0.34, 0.33, 0.33], [0.1, 0.1, 0.8]])
    np.testing.assert_allclose(margins(p), [0.2, 0.01, 0.7])
    with pytest.raises(ReviewError, match=r"shape \(n, C\) with C >= 2, got \(3,\)"):
        margins(np.ones(3))


def test_uncertainty_order_is_lowest_margin_first_ties_in_photo_order(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=16, crop=grey, skip=(3,))  # patch id 4
    ws.add_labels([(6, "none")], reviewer="x")
    probs = {
        1: np.array([0.9, 0.1, 0, 0, 0, 0]),  # margin 0.8
        2: np.array([0.4, 0.35, 0.25, 0, 0, 0]),  # 0.05
        3: np.array([0.5, 0.3, 0.2, 0, 0, 0]),  # 0.2
        4: np.array([0.34, 0.33, 0.33, 0, 0, 0]),  # 0.01 but review_skip: left out
        5: np.array([0.45, 0.25, 0.3, 0, 0, 0]),  # 0.15
    }
    recs = ws.patches()
    assert build_queue(recs, reviewer="a") == [1, 2, 3, 5]  # photo order by default
    assert build_queue(recs, reviewer="a", probabilities=probs) == [2, 5, 3, 1]
    tie = {k: np.array([0.5, 0.5, 0, 0, 0, 0]) for k in (1, 2, 3, 5)}
    assert build_queue(recs, reviewer="a", probabilities=tie) == [1, 2, 3, 5]
    # skipped patches come last, oldest skip first
    assert build_queue(recs, reviewer="a", probabilities=probs, skipped={5: 2.0, 2: 1.0}) == [
        3,
        1,
        2,
        5,
    ]
    with pytest.raises(
        ReviewError, match="unknown queue 'later'; choose one of: unlabelled, audit"
    ):
        build_queue(recs, reviewer="a", queue="later")


def test_audit_sample_is_seeded_and_leaves_out_own_labels(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=16, crop=grey)
    ws.add_labels([(i, "none") for i in range(1, 6)], reviewer="ana")
    ws.add_labels([(2, "none")], reviewer="ben")
    ev = ws.label_events()
    q1 = build_queue(ws.patches(), reviewer="ben", queue="audit", events=ev, audit_size=3, seed=1)
    q2 = build_queue(ws.patches(), reviewer="ben", queue="audit", events=ev, audit_size=3, seed=1)
    assert q1 == q2 and len(q1) == 3 and 2 not in q1 and 6 not in q1 and q1 == sorted(q1)


# ----- sheet answers -----------------------------------------------------------------------------------


def test_sheet_answers():
    assert parse_sheet_answer("all none except 3 7", 8, CS) == {
        k: "none" for k in (1, 2, 4, 5, 6, 8)
    }
    assert parse_sheet_answer("5=vertical", 8, CS) == {5: "vertical"}
    assert parse_sheet_answer("all 0, 2-3=v 4=x 8=diagonal_f", 8, CS) == {
        1: "none",
        2: "vertical",
        3: "vertical",
        4: None,
        5: "none",
        6: "none",
        7: "none",
        8: "diagonal_falling",
    }


@pytest.mark.parametrize(
    "text,match",
    [
        ("all d", r"unknown class 'd'; use a class number, name or unique start .*0=none"),
        ("9=none", r"patch number '9' is not on this sheet \(1-8\)"),
        ("except 3", r"'except' only follows 'all CLASS'"),
        ("3 7", r"cannot read '3'"),
        ("all", r"'all' needs a class"),
        ("", "empty answer"),
    ],
)
def test_bad_sheet_answers(text, match):
    with pytest.raises(SheetAnswerError, match=match):
        parse_sheet_answer(text, 8, CS)


# ----- session --------------------------------------------------------------------------------------


def test_session_answer_skip_undo_and_history(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 5, size=16, crop=grey)
    s = Session(ws, "ana", build_queue(ws.patches(), reviewer="ana"))
    s.answer("none")  # 1
    s.answer("vertical")  # 2
    assert s.undo().id == 2  # back to patch 2, event removed from the history
    s.answer("map")  # 2
    s.skip()  # 3 goes to the end
    assert s.current().id == 4
    s.answer(None)  # 4 unsure
    assert s.progress()["done"] == 3 and s.progress()["remaining"] == 2
    assert [(e["patch_id"], e["label"], e["reviewer"]) for e in ws.label_events()] == [
        (1, "none", "ana"),
        (2, "map", "ana"),
        (4, None, "ana"),
    ]
    assert [(e["patch_id"], e["label"]) for e in ws.undone_events()] == [(2, "vertical")]
    assert set(ws.review_skips("ana")) == {3}
    # resume: a new session starts at 5, the skipped 3 comes last
    assert build_queue(ws.patches(), reviewer="ana", skipped=ws.review_skips("ana")) == [5, 3]


def test_session_sheet_answers_and_undo(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=16, crop=grey)
    s = Session(ws, "ana", build_queue(ws.patches(), reviewer="ana"))
    s.answer_many({0: "none", 2: "map", 3: "none"})  # offset 1 (patch 2) left open
    assert s.current().id == 2
    assert [e["patch_id"] for e in ws.label_events()] == [1, 3, 4]
    s.undo()
    assert ws.label_events() == [] and s.current().id == 1
    s.skip(3)
    assert [r.id for r in s.upcoming(6)] == [4, 5, 6, 1, 2, 3]
    s.undo()
    assert ws.review_skips("ana") == {} and s.current().id == 1


def test_model_suggestion_accepted_with_its_source(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 2, size=16, crop=grey)
    probs = {1: np.array([0.1, 0.1, 0.1, 0.6, 0.05, 0.05]), 2: np.full(6, 1 / 6)}
    s = Session(ws, "ana", [1, 2], suggestions=probs)
    assert s.suggestion(1) == ("vertical", pytest.approx(0.6))
    s.accept_suggestion()
    assert ws.label_events()[0]["origin"] == "suggestion"
    with pytest.raises(ReviewError, match="no model suggestion"):
        Session(ws, "ana", [2]).accept_suggestion()


def test_labels_from_another_reviewer_leave_the_queue(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 3, size=16, crop=grey)
    s = Session(ws, "ana", [1, 2, 3], check_fresh=True)
    ws.add_labels([(1, "none")], reviewer="ben")  # ben labels patch 1 while ana's session runs
    assert s.current().id == 2


def test_empty_reviewer_is_refused(tmp_path):
    with pytest.raises(ReviewError, match="reviewer name must not be empty"):
        Session(make_ws(tmp_path / "ws", 1, 1, size=16, crop=grey), " ", [1])


# ----- store -----------------------------------------------------------------------------------------

_WRITER = """
import sys
from trainkit.store.workspace import Workspace
ws = Workspace.open(sys.argv[1])
for i in range(int(sys.argv[3])):
    ws.add_label_event(1 + i % 6, "none" if i % 2 else "map", reviewer=sys.argv[2])
"""


def test_two_reviewer_processes_at_once_keep_every_event(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 6, size=16, crop=grey)
    n = 150
    procs = [
        subprocess.Popen([sys.executable, "-c", _WRITER, str(ws.root), name, str(n)])
        for name in ("ana", "ben")
    ]
    assert [p.wait(timeout=120) for p in procs] == [0, 0]
    ev = ws.label_events()
    assert len(ev) == 2 * n and len({e["id"] for e in ev}) == 2 * n
    assert sum(e["reviewer"] == "ana" for e in ev) == n


def test_open_adds_review_tables_to_an_older_workspace_and_refuses_newer(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 1, size=16, crop=grey)
    con = sqlite3.connect(ws.db_path)
    con.execute("DROP TABLE review_skips")
    con.commit()
    con.close()
    Workspace.open(ws.root).set_review_skip(1, "ana")  # table recreated on open
    ws.set_meta("schema_version", "4")
    with pytest.raises(WorkspaceError, match="has schema version 4, this kit reads 3"):
        Workspace.open(ws.root)


# ----- terminal helpers (review_ui) ----------------------------------------------------------------


def test_mode_falls_back_to_contact_sheets_without_colour_or_room():
    from rich.console import Console

    from trainkit.labels.review_ui import choose_mode

    big = dict(force_terminal=True, width=120, height=50)
    assert choose_mode(False, Console(color_system="truecolor", **big), num_classes=6) == (
        "keys",
        None,
    )
    mode, why = choose_mode(False, Console(color_system=None, **big), num_classes=6)
    assert mode == "sheet" and "no colour" in why
    small = Console(color_system="truecolor", force_terminal=True, width=40, height=20)
    mode, why = choose_mode(False, small, num_classes=6)
    assert mode == "sheet" and "40x20 is smaller than 60x34" in why


def test_shrunk_preview_keeps_a_hairline_and_half_blocks_pair_rows():
    from trainkit.labels.review_ui import contact_sheet, downsample, halfblock_rows

    img = np.full((128, 128, 3), 180, np.uint8)
    img[:, 64] = 40  # a 1-pixel dark line
    plain = np.asarray(Image.fromarray(img).resize((48, 48), Image.BOX))
    ours = downsample(img, 48)
    assert ours.min() < plain.min() - 20  # darker than plain box averaging: still visible
    rows = halfblock_rows(np.arange(4 * 2 * 3, dtype=np.uint8).reshape(4, 2, 3))
    assert len(rows) == 2 and rows[0][1] == ((3, 4, 5), (9, 10, 11))  # (upper, lower) pixel
    sheet = contact_sheet([img] * 7, cols=6, cell=50)
    assert sheet.size == (6 * 50 + 7 * 8, 2 * 50 + 3 * 8)
