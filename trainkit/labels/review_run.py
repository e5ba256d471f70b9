"""One review run end to end: build the queue, open a session, pick key or sheet mode, run it, sum up.

The rules of queues and answers live in :mod:`trainkit.labels.review` and the terminal
in :mod:`trainkit.labels.review_ui`; this module only puts them together for
``trainkit review`` (or a notebook that wants the same session).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from trainkit.labels.review import QUEUES, ReviewError, Session, build_queue, find_conflicts
from trainkit.store.workspace import Workspace

__all__ = ["ReviewRequest", "prepare_session", "run_review", "summary_line", "sheet_path"]


@dataclass(frozen=True)
class ReviewRequest:
    """What a reviewer asked for.

    Args:
        reviewer: the name stored with every label.
        queue: ``unlabelled``, ``audit``, ``conflicts``, ``picked`` or ``boundary`` (see
            :mod:`trainkit.labels.review`).
        model: an exported model (``.onnx`` or experiment folder): least certain patches
            first in the unlabelled queue, and its suggestion on Enter.
        audit_size: patches in the audit sample.
        seed: seed of the audit sample.
        sheet: contact-sheet mode even when the terminal could do one-key mode.
        grid: contact sheet (columns, rows) of patches.
        viewer: a program that opens the sheet PNG, or None.
    """

    reviewer: str
    queue: str = "unlabelled"
    model: Path | None = None
    audit_size: int = 50
    seed: int = 0
    sheet: bool = False
    grid: tuple[int, int] = (6, 4)
    viewer: str | None = None

    def __post_init__(self) -> None:
        if self.queue not in QUEUES:
            raise ReviewError(f"unknown queue {self.queue!r}; choose one of: {', '.join(QUEUES)}")


def prepare_session(
    ws: Workspace,
    request: ReviewRequest,
    *,
    progress: Callable[[int, int], None] | None = None,
) -> Session | None:
    """The session of ``request``'s queue, or None when the queue is empty.

    Args:
        ws: the workspace.
        request: what the reviewer asked for.
        progress: called with (done, total) while the model predicts.
    """
    from trainkit.labels.review import model_probabilities

    kind = request.queue
    # the unlabelled and picked queues ask about unlabelled patches, audit and conflicts about
    # labelled ones: only those rows are read, in light form (an archive holds millions);
    # the boundary queue's patches are few and named by the drawings' measures
    picks = [p["patch_id"] for p in ws.picked_patches(unanswered=True)]
    boundary = None
    if kind == "boundary":
        from trainkit.labels.drawings import BOUNDARY_QUEUE_DEG

        boundary = [p for p, _ in ws.drawing_boundary_patches(BOUNDARY_QUEUE_DEG)]
        records = ws.patches(ids=boundary)
    else:
        records = ws.queue_rows(
            labelled=kind not in ("unlabelled", "picked"), ids=picks if kind == "picked" else None
        )
    events = ws.label_events() if kind in ("audit", "conflicts") else []
    probs = None
    if request.model is not None:
        wanted = set(picks) if kind == "picked" else None
        todo = [
            r.id
            for r in records
            if not r.review_skip
            and (kind not in ("unlabelled", "picked") or not r.labelled)
            and (wanted is None or r.id in wanted)
        ]
        probs = model_probabilities(request.model, ws, ws.patches(ids=todo), progress=progress)
    queue = build_queue(
        records,
        reviewer=request.reviewer,
        queue=kind,
        probabilities=probs if kind == "unlabelled" else None,
        skipped=ws.review_skips(request.reviewer),
        events=events,
        audit_size=request.audit_size,
        seed=request.seed,
        picks=picks,
        boundary=boundary,
    )
    if not queue:
        return None
    settles = None
    if kind == "conflicts":
        settles = {pid: sorted(by) for pid, by in find_conflicts(events).items()}
    return Session(
        ws,
        request.reviewer,
        queue,
        suggestions=probs,
        settles=settles,
        check_fresh=kind in ("unlabelled", "picked"),
    )


def sheet_path(ws: Workspace, reviewer: str) -> Path:
    """Where a reviewer's contact sheet is written: ``WS/review/sheet-<reviewer>.png``."""
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", reviewer)
    return ws.root / "review" / f"sheet-{safe}.png"


def run_review(
    ws: Workspace,
    request: ReviewRequest,
    session: Session,
    console,
    *,
    getchar: Callable[[], str] | None = None,
    read_line: Callable[[], str] | None = None,
) -> dict:
    """Run ``session`` in key mode (or sheet mode) on ``console`` until it ends or is quit.

    Key mode needs a big enough colour terminal; otherwise, or with ``request.sheet``, the
    contact sheet is used and the reason is printed. The reviewer may also switch from
    key mode to the sheet.

    Args:
        ws: the workspace.
        request: what the reviewer asked for.
        session: from :func:`prepare_session`.
        console: the rich console the review is shown on.
        getchar: where key mode reads keys (default: the terminal, see ``review_ui``).
        read_line: where sheet mode reads answer lines (default: the terminal).

    Returns:
        ``reviewer``, ``queue``, ``outcome`` (``finished``, ``quit`` or ``interrupted`` by
        Ctrl-C), ``done`` (labels this session), ``remaining`` and ``per_minute``.
    """
    from trainkit.labels.review_ui import choose_mode, run_keys, run_sheet

    mode, why = choose_mode(request.sheet, console, num_classes=ws.class_set.num_classes)
    if why:
        console.print(f"trainkit: {why}", style="yellow", soft_wrap=True)
    outcome = (
        "sheet"
        if mode == "sheet"
        else run_keys(session, console, viewer=request.viewer, getchar=getchar)
    )
    if outcome == "sheet":
        cols, rows = request.grid
        outcome = run_sheet(
            session,
            console,
            sheet_path(ws, request.reviewer),
            cols=cols,
            rows=rows,
            viewer=request.viewer,
            read_line=read_line,
        )
    p = session.progress()
    return {
        "reviewer": request.reviewer,
        "queue": request.queue,
        "outcome": outcome,
        "done": p["done"],
        "remaining": p["remaining"],
        "per_minute": p["per_minute"],
    }


def summary_line(result: dict) -> str:
    """The line that ends a review run: labels this session, rate, and what is left."""
    head = (
        f"{result['reviewer']}: {result['done']} labels this session "
        f"({result['per_minute']:.1f} per min); "
    )
    if result["outcome"] == "finished":
        return head + "queue finished"
    stop = "interrupted, " if result["outcome"] == "interrupted" else ""
    return head + f"{stop}{result['remaining']} left; run the same command to resume"
