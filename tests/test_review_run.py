"""One review run put together: queue choice, key/sheet mode, the closing summary line."""

from __future__ import annotations

import io

import pytest
from _helpers import make_ws
from rich.console import Console

from trainkit.labels.review import ReviewError
from trainkit.labels.review_run import (
    ReviewRequest,
    prepare_session,
    run_review,
    sheet_path,
    summary_line,
)


def plain_console() -> tuple[Console, io.StringIO]:
    out = io.StringIO()
    return Console(file=out, width=100, highlight=False), out


def test_unlabelled_queue_leaves_out_flagged_patches_and_empties(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 4, skip=(1,))
    by_col = {r.col: r.id for r in ws.patches()}
    session = prepare_session(ws, ReviewRequest(reviewer="ana"))
    assert session.queue == [by_col[0], by_col[2], by_col[3]]  # photo order, col 1 skipped
    ws.add_labels([(by_col[c], "none") for c in (0, 2, 3)], reviewer="ben")
    assert prepare_session(ws, ReviewRequest(reviewer="ana")) is None


def test_conflict_queue_settles_the_disagreeing_reviewers(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 2)
    a, b = sorted(r.id for r in ws.patches())
    ws.add_labels([(a, "none"), (b, "map")], reviewer="ana")
    ws.add_labels([(a, "vertical"), (b, "map")], reviewer="ben")
    session = prepare_session(ws, ReviewRequest(reviewer="cy", queue="conflicts"))
    assert session.queue == [a] and session.settles == {a: ["ana", "ben"]}


def test_unknown_queue_is_refused_with_the_choices():
    with pytest.raises(ReviewError, match="unknown queue 'everything'; choose one of: unlabelled"):
        ReviewRequest(reviewer="ana", queue="everything")


def test_sheet_run_to_the_end(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 3)
    request = ReviewRequest(reviewer="ana b/c", sheet=True, grid=(2, 1))
    answers = iter(["all none", "all map"])  # two sheets of 2 + 1 patches
    console, out = plain_console()
    session = prepare_session(ws, request)
    result = run_review(ws, request, session, console, read_line=lambda: next(answers))
    assert result["outcome"] == "finished" and result["done"] == 3 and result["remaining"] == 0
    assert [e["label"] for e in ws.label_events()] == ["none", "none", "map"]
    assert {e["reviewer"] for e in ws.label_events()} == {"ana b/c"}
    assert sheet_path(ws, "ana b/c") == ws.root / "review" / "sheet-ana_b_c.png"
    assert sheet_path(ws, "ana b/c").is_file()
    line = summary_line(result)
    assert line.startswith("ana b/c: 3 labels this session (") and line.endswith("queue finished")


def test_quitting_a_run_tells_how_to_resume(tmp_path):
    ws = make_ws(tmp_path / "ws", 1, 3)
    request = ReviewRequest(reviewer="ana")  # keys asked for, but the console is no terminal

    def no_more_input():
        raise EOFError

    console, out = plain_console()
    session = prepare_session(ws, request)
    result = run_review(ws, request, session, console, read_line=no_more_input)
    assert "trainkit: not a terminal: using contact-sheet mode" in out.getvalue()
    assert result["outcome"] == "quit" and result["done"] == 0 and result["remaining"] == 3
    assert summary_line(result).endswith("3 left; run the same command to resume")


def test_ctrl_c_in_key_mode_ends_the_run_as_interrupted_with_answers_kept(tmp_path):
    from trainkit.labels.review_ui import run_keys

    ws = make_ws(tmp_path / "ws", 1, 3)
    session = prepare_session(ws, ReviewRequest(reviewer="ana"))
    keys = iter(["1", "\x03", "2"])  # one answer, then Ctrl-C (a byte in key mode)
    console, _ = plain_console()
    assert run_keys(session, console, getchar=lambda: next(keys)) == "interrupted"
    assert [e["label"] for e in ws.label_events()] == ["horizontal"]
    line = summary_line(
        {"reviewer": "ana", "outcome": "interrupted", "done": 1, "remaining": 2, "per_minute": 1.0}
    )
    assert line.endswith("interrupted, 2 left; run the same command to resume")
