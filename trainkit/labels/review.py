"""Review session logic: queue order, model pre-labels, answers with undo and skip, agreement.

Nothing here draws on a terminal; :mod:`trainkit.labels.review_ui` shows patches and reads keys
and calls into this module, so every rule below is testable without a screen.

Queues (which patches a session asks about, in which order):

- ``unlabelled`` (default): patches never labelled, in photo then grid order; with model
  probabilities, lowest margin first (top-1 minus top-2 probability; ties keep photo
  order), so the patches the model is least sure about are answered first. Patches
  picked to be labelled (``trainkit pick``, :mod:`trainkit.labels.picking`) and not
  answered yet come before the rest, in pick then rank order.
- ``picked``: only the picked patches not answered yet, in pick then rank order.
- ``audit``: a seeded random sample of already-labelled patches this reviewer has not
  labelled, shown without their current label, to measure agreement.
- ``conflicts``: patches whose reviewers' latest labels disagree and that nobody has
  settled since; the answer is recorded as a settlement of those reviewers' labels.
- ``boundary``: patches an imported crack drawing (:mod:`trainkit.labels.drawings`) found
  oriented within ``BOUNDARY_QUEUE_DEG`` of a class boundary and no person has labelled
  since, nearest the boundary first: the drawing's label (or its ambiguity) for a person
  to confirm or correct.

In every queue, patches with ``review_skip`` set (``tile --skip-flagged``) are left out,
a job's sampled cells come first, and patches this reviewer skipped come last. Resuming is re-building the queue: what
was answered has left it, so a new session starts where the last one stopped.
"""

from __future__ import annotations

import time
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.core.taxonomy import ClassSet
from trainkit.store.pixels import PatchPixels
from trainkit.store.workspace import PatchRecord, Workspace

__all__ = [
    "QUEUES",
    "ReviewError",
    "SheetAnswerError",
    "Session",
    "margins",
    "build_queue",
    "parse_class_token",
    "parse_sheet_answer",
    "latest_by_reviewer",
    "find_conflicts",
    "agreement",
    "load_patch",
    "model_probabilities",
    "describe_drawing",
]

QUEUES = ("unlabelled", "audit", "conflicts", "picked", "boundary")
UNSURE_TOKENS = ("x", "unsure")


class ReviewError(TrainkitError):
    """A review request that cannot be carried out; the message says why."""


class SheetAnswerError(TrainkitError):
    """A contact-sheet answer that cannot be read; the message names the bad part."""


# ----- queue order -------------------------------------------------------------------------


def margins(probabilities: np.ndarray) -> np.ndarray:
    """Top-1 minus top-2 probability per row: small means the model is unsure.

    Args:
        probabilities: (N, C) class probabilities, C >= 2.
    """
    p = np.asarray(probabilities, dtype=float)
    if p.ndim != 2 or p.shape[1] < 2:
        raise ReviewError(f"expected probabilities of shape (n, C) with C >= 2, got {p.shape}")
    top2 = np.sort(p, axis=1)[:, -2:]
    return top2[:, 1] - top2[:, 0]


def build_queue(
    records: list[PatchRecord],
    *,
    reviewer: str,
    queue: str = "unlabelled",
    probabilities: dict[int, np.ndarray] | None = None,
    skipped: dict[int, float] | None = None,
    events: list[dict] | None = None,
    audit_size: int = 50,
    seed: int = 0,
    picks: Sequence[int] | None = None,
    boundary: Sequence[int] | None = None,
) -> list[int]:
    """Patch ids to review, in order (see the module docstring for each queue's rule).

    Args:
        records: all patches, in photo then grid order (``Workspace.patches()``).
        reviewer: who reviews (their own labels and skips matter for audit and order).
        queue: one of :data:`QUEUES`.
        probabilities: patch id -> class probabilities; orders the unlabelled queue by margin.
        skipped: patch id -> time this reviewer skipped it; those come last, oldest skip first.
        events: all label events (``Workspace.label_events()``), needed by audit and conflicts.
        audit_size: how many labelled patches the audit sample draws.
        seed: random seed of the audit sample (same seed, same sample).
        picks: picked patch ids in pick then rank order
            (``Workspace.picked_patches()``); they lead the unlabelled queue and make up
            the picked queue.
        boundary: patch ids of the boundary queue, nearest a class boundary first
            (``Workspace.drawing_boundary_patches()``).
    """
    if queue not in QUEUES:
        raise ReviewError(f"unknown queue {queue!r}; choose one of: {', '.join(QUEUES)}")
    skipped = skipped or {}
    pool = [r for r in records if not r.review_skip]
    rank = {pid: k for k, pid in enumerate(dict.fromkeys(picks or ()))}
    if queue == "unlabelled":
        ids = [r.id for r in pool if not r.labelled]
        if probabilities:
            missing = [i for i in ids if i not in probabilities]
            if missing:
                raise ReviewError(f"no model probabilities for patches {missing[:5]}")
            m = margins(np.stack([probabilities[i] for i in ids])) if ids else np.zeros(0)
            ids = [ids[k] for k in np.argsort(m, kind="stable")]
        # patches picked to be labelled come first, in pick then rank order
        ids = sorted((i for i in ids if i in rank), key=rank.__getitem__) + [
            i for i in ids if i not in rank
        ]
    elif queue == "picked":
        ids = sorted((r.id for r in pool if not r.labelled and r.id in rank), key=rank.__getitem__)
    elif queue == "boundary":
        keep = {r.id for r in pool}
        ids = [pid for pid in dict.fromkeys(boundary or ()) if pid in keep]
    elif queue == "audit":
        mine = {e["patch_id"] for e in events or [] if e["reviewer"] == reviewer}
        cand = [r.id for r in pool if r.labelled and r.id not in mine]
        rng = np.random.default_rng(seed)
        pick = rng.permutation(len(cand))[: max(0, audit_size)]
        ids = [cand[k] for k in sorted(pick)]
    else:
        keep = {r.id for r in pool}
        ids = [pid for pid in find_conflicts(events or []) if pid in keep]
    # A job's acceptance-sample cells come first: an engineer is waiting for that estimate.
    job = {r.id for r in pool if r.job is not None}
    front = [i for i in ids if i not in skipped]
    front = [i for i in front if i in job] + [i for i in front if i not in job]
    back = sorted((i for i in ids if i in skipped), key=lambda i: skipped[i])
    return front + back


# ----- agreement and conflicts ----------------------------------------------------------------


def latest_by_reviewer(events: list[dict]) -> dict[int, dict[str, dict]]:
    """Patch id -> reviewer -> that reviewer's latest own (non-settling) labelling event.

    Events with an unsure (None) label count as that reviewer's latest answer.
    """
    out: dict[int, dict[str, dict]] = defaultdict(dict)
    for e in sorted(events, key=lambda e: e["id"]):
        if e.get("settles"):
            continue
        out[e["patch_id"]][e["reviewer"]] = e
    return dict(out)


def find_conflicts(events: list[dict]) -> dict[int, dict[str, str]]:
    """Unsettled disagreements: patch id -> {reviewer: label}, in patch id order.

    A patch is in conflict when at least two reviewers' latest labels are different
    class names (unsure answers do not count) and no settling event came after them.
    """
    latest = latest_by_reviewer(events)
    last_settle: dict[int, int] = {}
    for e in events:
        if e.get("settles"):
            last_settle[e["patch_id"]] = max(last_settle.get(e["patch_id"], 0), e["id"])
    out: dict[int, dict[str, str]] = {}
    for pid in sorted(latest):
        answers = {r: e for r, e in latest[pid].items() if e["label"] is not None}
        if len({e["label"] for e in answers.values()}) < 2:
            continue
        if last_settle.get(pid, 0) > max(e["id"] for e in answers.values()):
            continue
        out[pid] = {r: e["label"] for r, e in sorted(answers.items())}
    return out


def agreement(events: list[dict], class_set: ClassSet) -> list[dict]:
    """Cohen's kappa and confusion between every pair of reviewers on patches both labelled.

    Each reviewer's latest own label per patch is used (settling labels and unsure
    answers are left out). Kappa is nan when undefined (both gave one single class).

    Returns:
        One dict per pair with ``reviewers`` (a, b), ``n`` (patches both labelled),
        ``kappa``, ``kappa_crack_vs_none``, ``observed_agreement``, ``labels`` and
        ``confusion`` (rows: reviewer a, columns: reviewer b).
    """
    from trainkit.metrics import cohen_kappa, confusion_matrix

    latest = latest_by_reviewer(events)
    per: dict[str, dict[int, str]] = defaultdict(dict)
    for pid, by in latest.items():
        for r, e in by.items():
            if e["label"] is not None:
                per[r][pid] = e["label"]
    names = list(class_set.names)
    none = names[0]
    reviewers = sorted(per)
    out = []
    for i, a in enumerate(reviewers):
        for b in reviewers[i + 1 :]:
            common = sorted(set(per[a]) & set(per[b]))
            row: dict = {"reviewers": (a, b), "n": len(common), "labels": names}
            if not common:
                row.update(kappa=None, kappa_crack_vs_none=None, observed_agreement=None)
                row["confusion"] = np.zeros((len(names), len(names)), dtype=int).tolist()
                out.append(row)
                continue
            la = [per[a][p] for p in common]
            lb = [per[b][p] for p in common]
            ca = ["none" if v == none else "crack" for v in la]
            cb = ["none" if v == none else "crack" for v in lb]
            row["kappa"] = cohen_kappa(la, lb, labels=names)
            row["kappa_crack_vs_none"] = cohen_kappa(ca, cb, labels=["none", "crack"])
            row["observed_agreement"] = float(
                np.mean([x == y for x, y in zip(la, lb, strict=True)])
            )
            row["confusion"] = confusion_matrix(la, lb, labels=names).tolist()
            out.append(row)
    return out


# ----- answers ---------------------------------------------------------------------------------


def parse_class_token(token: str, class_set: ClassSet) -> str | None:
    """A class from its name, a unique name prefix or its number; ``x``/``unsure`` is None.

    Raises:
        SheetAnswerError: naming the token and the valid choices.
    """
    t = token.strip().lower()
    if t in UNSURE_TOKENS:
        return None
    names = class_set.names
    if t.isdigit():
        if int(t) < len(names):
            return names[int(t)]
    else:
        if t in names:
            return t
        hits = [n for n in names if n.startswith(t)] if t else []
        if len(hits) == 1:
            return hits[0]
    choices = ", ".join(f"{i}={n}" for i, n in enumerate(names))
    raise SheetAnswerError(
        f"unknown class {token!r}; use a class number, name or unique start of a name "
        f"({choices}), or x for unsure"
    )


def _numbers(token: str, n: int) -> list[int]:
    try:
        if "-" in token:
            lo, hi = (int(v) for v in token.split("-", 1))
            nums = list(range(lo, hi + 1))
        else:
            nums = [int(token)]
    except ValueError:
        raise SheetAnswerError(
            f"cannot read {token!r}: expected a patch number 1-{n} or a range like 3-6"
        ) from None
    bad = [k for k in nums if not 1 <= k <= n]
    if bad or not nums:
        raise SheetAnswerError(f"patch number {token!r} is not on this sheet (1-{n})")
    return nums


def parse_sheet_answer(text: str, n: int, class_set: ClassSet) -> dict[int, str | None]:
    """Read a contact-sheet answer into {patch number (1-based): class name or None = unsure}.

    Grammar (tokens separated by spaces or commas, case ignored):

    - ``all CLASS``: every patch on the sheet gets CLASS;
    - ``except N M ...`` (after ``all``): leave those patches unanswered (they stay queued);
    - ``N=CLASS`` or ``N-M=CLASS``: these patches get CLASS (overrides ``all``).

    CLASS is a class number, a name or a unique start of one (``v`` = vertical), or
    ``x`` for unsure. Example: ``all none except 3 7`` or ``all 0 5=vertical 9-10=map``.

    Raises:
        SheetAnswerError: naming the part that cannot be read.
    """
    tokens = text.replace(",", " ").lower().split()
    if not tokens:
        raise SheetAnswerError("empty answer; type ? for the answer syntax")
    default: tuple[bool, str | None] = (False, None)
    excluded: set[int] = set()
    explicit: dict[int, str | None] = {}
    i = 0
    in_except = False
    while i < len(tokens):
        tok = tokens[i]
        if tok == "all":
            if i + 1 >= len(tokens):
                raise SheetAnswerError("'all' needs a class, e.g. 'all none'")
            default = (True, parse_class_token(tokens[i + 1], class_set))
            i += 2
            in_except = False
            continue
        if tok == "except":
            if not default[0]:
                raise SheetAnswerError(
                    "'except' only follows 'all CLASS', e.g. 'all none except 3'"
                )
            in_except = True
            i += 1
            continue
        if "=" in tok:
            left, right = tok.split("=", 1)
            label = parse_class_token(right, class_set)
            for k in _numbers(left, n):
                explicit[k] = label
            i += 1
            continue
        if in_except:
            excluded.update(_numbers(tok, n))
            i += 1
            continue
        raise SheetAnswerError(
            f"cannot read {tok!r}; write 'all CLASS', 'except N ...' or 'N=CLASS' "
            "(e.g. 'all none except 3 7' or '5=vertical')"
        )
    out: dict[int, str | None] = {}
    if default[0]:
        out = {k: default[1] for k in range(1, n + 1) if k not in excluded}
    out.update(explicit)
    return out


# ----- drawings ----------------------------------------------------------------------------------


def describe_drawing(measure: dict, *, short: bool = False) -> str:
    """What a crack drawing says of a patch, in words: its label (or why it is ambiguous),
    the crack's angle, length and widths (in mm too where the photo's scale is known).

    ``short`` gives a few words for a contact sheet's note."""

    def px_mm(px: float | None, mm: float | None) -> str:
        return f"{px:.1f} px" + (f" ({mm:.2f} mm)" if mm is not None else "")

    label = measure["label"] or "ambiguous"
    if short:
        parts = [f"drawn {label}"]
        if measure["angle_deg"] is not None:
            parts.append(f"{measure['angle_deg']:.0f} deg")
        if measure["width_px"] is not None:
            parts.append(f"w {measure['width_px']:.1f}px")
        return " ".join(parts)
    head = f"drawing: {label}" + (f" ({measure['reason']})" if measure["label"] is None else "")
    if not measure["length_px"]:
        return head
    text = f"{head}; crack {px_mm(measure['length_px'], measure['length_mm'])} long"
    if measure["width_px"] is not None:
        text += f", {px_mm(measure['width_px'], measure['width_mm'])} wide"
        text += f" (widest {px_mm(measure['width_max_px'], measure['width_max_mm'])})"
    if measure["angle_deg"] is not None:
        text += f"; angle {measure['angle_deg']:.1f} deg"
    if measure["boundary_deg"] is not None:
        text += f", {measure['boundary_deg']:.1f} deg from a class boundary"
    return text


# ----- patches and model -------------------------------------------------------------------------


def load_patch(ws: Workspace, record: PatchRecord) -> np.ndarray:
    """A patch's crop as (S, S, 3) uint8 RGB, cut from its photo when not stored yet (and
    then stored: a patch shown for review is about to be labelled).

    Raises:
        PhotoMissingError: the photo it must be cut from is missing or changed.
    """
    return _pixels(ws).one(record)


_PIXELS: dict[Path, PatchPixels] = {}


def _pixels(ws: Workspace) -> PatchPixels:
    """One :class:`PatchPixels` per workspace for the review process: moving through a
    photo's patches one at a time decodes the photo once."""
    root = Path(ws.root).resolve()
    if root not in _PIXELS:
        _PIXELS.clear()  # one workspace at a time keeps at most its decoded photos
        _PIXELS[root] = PatchPixels(ws)
    return _PIXELS[root]


def model_probabilities(
    model: str | Path, ws: Workspace, records: list[PatchRecord], *, progress=None
) -> dict[int, np.ndarray]:
    """Class probabilities of an exported screener for the given patches (ONNX only, no torch).

    Args:
        model: a ``model.onnx`` or an experiment folder holding one.
        ws: the workspace.
        records: the patches to predict.
        progress: optional callable(done, total).

    Raises:
        ReviewError: when the model's classes are not the workspace's classes.
    """
    from trainkit.screener import Screener

    path = Path(model)
    if path.is_dir():
        path = Experiment(path).model_path
    with Screener(path) as scr:
        return _predict_records(ws, records, scr, path, progress)


def _predict_records(ws, records, scr, path: Path, progress) -> dict[int, np.ndarray]:

    if tuple(scr.class_names) != tuple(ws.class_set.names):
        raise ReviewError(
            f"model {path} predicts classes {scr.class_names}, the workspace uses "
            f"{list(ws.class_set.names)}"
        )
    out: dict[int, np.ndarray] = {}
    step = 64
    pixels = _pixels(ws)
    for start in range(0, len(records), step):
        chunk = records[start : start + step]
        if chunk:
            # not stored: a suggestion for every unlabelled patch is not a choice to label it
            probs = scr.predict(pixels.get(chunk, size=scr.patch_px, store=False, keep=True))
            out.update({r.id: p for r, p in zip(chunk, probs, strict=True)})
        if progress:
            progress(min(start + step, len(records)), len(records))
    return out


# ----- the session ---------------------------------------------------------------------------------


@dataclass
class _Action:
    kind: str  # "label" | "skip"
    pos: int
    patch_ids: list[int]
    event_ids: list[int] = field(default_factory=list)
    was_skipped: list[bool] = field(default_factory=list)
    order: list[int] = field(default_factory=list)  # queue slice before a sheet answer


class Session:
    """One reviewer working through a queue: answer, accept a suggestion, skip, undo.

    Args:
        ws: the workspace.
        reviewer: the reviewer's name, stored with every answer.
        queue: patch ids in order (from :func:`build_queue`).
        suggestions: patch id -> class probabilities of a model (Enter accepts the argmax).
        settles: patch id -> reviewers whose disagreement an answer settles (conflict queue).
        check_fresh: in the unlabelled queue, drop patches another reviewer labelled meanwhile.
    """

    def __init__(
        self,
        ws: Workspace,
        reviewer: str,
        queue: list[int],
        *,
        suggestions: dict[int, np.ndarray] | None = None,
        settles: dict[int, list[str]] | None = None,
        check_fresh: bool = False,
    ) -> None:
        if not reviewer or not reviewer.strip():
            raise ReviewError("reviewer name must not be empty; pass --reviewer NAME")
        self.ws = ws
        self.reviewer = reviewer.strip()
        self.queue = list(queue)
        self.suggestions = suggestions or {}
        self.settles = settles or {}
        self.check_fresh = check_fresh
        self.class_set = ws.class_set
        self.pos = 0
        self.answered = 0  # labels given in this session (net of undo)
        self.started = time.monotonic()
        self._history: list[_Action] = []
        self._records: dict[int, PatchRecord] = {}  # read a window at a time (see record)
        self._drawings: dict[int, dict] = {}  # drawing measures of the records read
        self._skipped = ws.review_skips(self.reviewer)

    # ----- state --------------------------------------------------------------
    @property
    def done(self) -> bool:
        """True when the queue is exhausted (after dropping patches labelled elsewhere)."""
        return self.current() is None

    def record(self, patch_id: int) -> PatchRecord:
        """The patch's record, read with the next patches of the queue when not read yet."""
        rec = self._records.get(patch_id)
        if rec is None:
            window = {patch_id, *self.queue[self.pos : self.pos + self._WINDOW]}
            self._records.update((r.id, r) for r in self.ws.patches(ids=window))
            self._drawings.update(self.ws.drawing_measures(window))
            rec = self._records[patch_id]
        return rec

    def drawing(self, patch_id: int) -> dict | None:
        """What an imported crack drawing says of the patch (its latest measure, see
        :meth:`~trainkit.store.workspace.Workspace.drawing_measures`), or None."""
        self.record(patch_id)
        return self._drawings.get(patch_id)

    #: Records read at once as the queue moves on (a queue may be millions of patches long).
    _WINDOW = 256

    def current(self) -> PatchRecord | None:
        """The patch to answer now, or None at the end of the queue."""
        while self.pos < len(self.queue):
            pid = self.queue[self.pos]
            if self.check_fresh and self.ws.label_history(pid):
                del self.queue[self.pos]  # another reviewer labelled it meanwhile
                continue
            return self.record(pid)
        return None

    def upcoming(self, n: int) -> list[PatchRecord]:
        """The next ``n`` patches from the current one (for a contact sheet)."""
        out = []
        while len(out) < n:
            cur = self.current()
            if cur is None or cur.id in {r.id for r in out}:
                break
            out.append(cur)
            self.pos += 1
        self.pos -= len(out)
        return out

    def suggestion(self, patch_id: int) -> tuple[str, float] | None:
        """The model's class and probability for a patch, or None without a model."""
        p = self.suggestions.get(patch_id)
        if p is None:
            return None
        k = int(np.argmax(p))
        return self.class_set.names[k], float(p[k])

    def progress(self) -> dict:
        """Counts for the status line: done, remaining, rate per minute, elapsed seconds."""
        elapsed = max(time.monotonic() - self.started, 1e-9)
        return {
            "done": self.answered,
            "remaining": max(0, len(self.queue) - self.pos),
            "per_minute": self.answered / (elapsed / 60.0),
            "elapsed_s": elapsed,
        }

    # ----- answers ------------------------------------------------------------
    def answer(self, label: str | None, *, origin: str = "reviewer") -> int:
        """Label the current patch (None = unsure) and move on; returns the event id."""
        cur = self.current()
        if cur is None:
            raise ReviewError("the queue is finished; nothing to label")
        ev = self._store(cur.id, label, origin)
        self._history.append(_Action("label", self.pos, [cur.id], [ev]))
        self.pos += 1
        self.answered += 1
        return ev

    def accept_suggestion(self) -> int:
        """Label the current patch with the model's suggestion (origin "suggestion")."""
        cur = self.current()
        if cur is None:
            raise ReviewError("the queue is finished; nothing to label")
        sug = self.suggestion(cur.id)
        if sug is None:
            raise ReviewError("no model suggestion for this patch; start with --model EXP_OR_ONNX")
        return self.answer(sug[0], origin="suggestion")

    def answer_many(self, answers: dict[int, str | None]) -> list[int]:
        """Label several patches of the upcoming run at once (a contact sheet).

        Args:
            answers: position offset from the current patch (0-based) -> class or None.
                Unanswered offsets stay in the queue, just after the answered run.

        Returns:
            The event ids, in offset order.
        """
        run = self.upcoming(max(answers) + 1 if answers else 0)
        if any(k >= len(run) or k < 0 for k in answers):
            raise ReviewError(f"only {len(run)} patches are left in the queue")
        events = [self._store(run[k].id, answers[k], "reviewer") for k in sorted(answers)]
        start = self.pos
        answered = [run[k].id for k in sorted(answers)]
        rest = [r.id for k, r in enumerate(run) if k not in answers]
        self.queue[start : start + len(run)] = answered + rest
        self._history.append(_Action("label", start, answered, events, order=[r.id for r in run]))
        self.pos += len(answered)
        self.answered += len(answered)
        return events

    def _store(self, pid: int, label: str | None, origin: str) -> int:
        settles = self.settles.get(pid)
        return self.ws.add_label_event(
            pid, label, reviewer=self.reviewer, origin=origin, settles=settles
        )

    def skip(self, n: int = 1) -> None:
        """Skip the current patch (or the next ``n``): recorded, and moved to the queue's end."""
        run = self.upcoming(n)
        if not run:
            raise ReviewError("the queue is finished; nothing to skip")
        ids = [r.id for r in run]
        was = [pid in self._skipped for pid in ids]
        for pid in ids:
            self.ws.set_review_skip(pid, self.reviewer)
            self._skipped[pid] = time.time()
        del self.queue[self.pos : self.pos + len(ids)]
        self.queue.extend(ids)
        self._history.append(_Action("skip", self.pos, ids, was_skipped=was))

    def undo(self) -> PatchRecord | None:
        """Take back the last answer or skip of this session; returns the patch to see again."""
        if not self._history:
            return None
        act = self._history.pop()
        if act.kind == "label":
            for ev in act.event_ids:
                self.ws.undo_label_event(ev)
            self.answered -= len(act.patch_ids)
            if act.order:
                self.queue[act.pos : act.pos + len(act.order)] = act.order
        else:
            k = len(act.patch_ids)
            del self.queue[len(self.queue) - k :]
            self.queue[act.pos : act.pos] = act.patch_ids
            for pid, was in zip(act.patch_ids, act.was_skipped, strict=True):
                if not was:
                    self.ws.set_review_skip(pid, self.reviewer, skipped=False)
                    self._skipped.pop(pid, None)
        self.pos = act.pos
        return self.record(act.patch_ids[0])
