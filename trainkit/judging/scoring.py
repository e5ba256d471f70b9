"""Score a model's predictions on one subset: the metrics dictionary, without any file or model I/O.

Everything here is a pure function of arrays (labels, probabilities, logits and the
patches' photo, group and scale), so evaluation, the benchmarks and the job checks all
compute their figures the same way. The keys of the dictionary are documented in
:mod:`trainkit.judging.evaluation`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from trainkit import metrics as M
from trainkit.core.caution import CAUTION
from trainkit.core.contract import screening_probability
from trainkit.core.errors import TrainkitError

__all__ = [
    "METRICS_VERSION",
    "Scored",
    "choose_threshold",
    "screen_block",
    "calibration_block",
    "acceptance_gate",
    "CASCADE_PASS_SHARE",
    "CASCADE_MAX_RECALL_DROP",
    "cascade_pass_threshold",
    "cascade_block",
    "score_predictions",
]

METRICS_VERSION = 1
#: Confidence of the recall promise an operating threshold carries (``--threshold-confidence``).
DEFAULT_PROMISE_CONFIDENCE = 0.9


@dataclass
class Scored:
    """A model's outputs on a set of labelled patches.

    Attributes:
        labels: (n,) true class indices (0 = none).
        probs: (n, C) softmax probabilities.
        logits: (n, C) logits (for calibration; may equal log-probabilities).
        photos: (n,) photo name of each patch (for the breakdowns).
        groups: (n,) structure group of each patch.
        patch_mm: (n,) surface width covered by each patch in mm (nan when unknown).
    """

    labels: np.ndarray
    probs: np.ndarray
    logits: np.ndarray
    photos: list[str] = field(default_factory=list)
    groups: list[str] = field(default_factory=list)
    patch_mm: np.ndarray | None = None

    def __len__(self) -> int:
        return int(len(self.labels))

    @property
    def screening(self) -> np.ndarray:
        """Screening probability 1 - P(none) of each patch, in float64."""
        return screening_probability(np.asarray(self.probs, dtype=np.float64))

    @property
    def is_crack(self) -> np.ndarray:
        return np.asarray(self.labels) != 0


def choose_threshold(
    val: Scored | None,
    *,
    target_recall: float,
    max_false_alarms: float | None = None,
    confidence: float = DEFAULT_PROMISE_CONFIDENCE,
) -> tuple[float, str, dict | None]:
    """The operating threshold chosen on validation, how it was chosen in words, and the
    recall promise it carries (None under a false-alarm budget or without validation cracks).

    With ``max_false_alarms`` the lowest threshold whose validation false-alarm rate is
    at most that budget. Otherwise the highest threshold at which recall >=
    ``target_recall`` holds with ``confidence`` given the number of validation cracks
    (:func:`trainkit.metrics.threshold_with_recall_promise`); with too few cracks for
    that promise, the lowest validation crack's score, and the words say how much
    confidence the cracks give and how many the promise needs. Without the patches a
    rule needs, 0.5 and the reason.
    """
    if max_false_alarms is not None:
        if val is not None and len(val) and np.any(~val.is_crack):
            t = M.threshold_for_false_alarms(
                val.is_crack, val.screening, max_false_alarm_rate=max_false_alarms
            )
            return (
                float(t),
                f"validation subset, false-alarm rate at most {max_false_alarms:g}",
                None,
            )
        return 0.5, "default 0.5 (validation has no clean patches)", None
    if val is not None and len(val) and np.any(val.is_crack):
        pr = M.threshold_with_recall_promise(
            val.is_crack,
            val.screening,
            target_recall=target_recall,
            confidence=confidence,
            photos=np.asarray(val.photos),
        )
        return pr.threshold, promise_words(pr.as_dict()), pr.as_dict()
    return 0.5, "default 0.5 (validation has no crack patches)", None


def promise_words(pr: dict) -> str:
    """How a threshold with a recall promise was chosen, in one sentence's words."""
    n, k = pr["cracks"], pr["below"]
    n_eff = pr.get("effective_cracks", n)
    counted = "" if n_eff == n else f", worth {n_eff:.0f} independent ones for their photos"
    if pr["kept"]:
        return (
            f"validation subset: recall >= {pr['target']:g} promised with confidence "
            f"{pr['confidence']:g} on photos like the validation photos (the {lowest_rank(k)} "
            f"of {n} validation crack scores{counted}; order-statistic bound)"
        )
    return (
        f"validation subset: only {n} validation cracks{counted}, fewer than the "
        f"{pr['cracks_needed']} a promise of recall >= {pr['target']:g} with confidence "
        f"{pr['confidence']:g} needs; "
        f"the lowest crack score is used, which keeps that recall with confidence "
        f"{pr['achieved_confidence']:.2f} only (NO PROMISE: label more validation cracks)"
    )


def lowest_rank(k: int) -> str:
    """The k-th lowest in words: "lowest", "2nd lowest", "3rd lowest", ..."""
    if k == 1:
        return "lowest"
    suffix = "th" if 10 <= k % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(k % 10, "th")
    return f"{k}{suffix} lowest"


def threshold_for_job_too(
    threshold: float,
    source: str,
    job: Scored | None,
    weights: np.ndarray | None,
    *,
    target_recall: float,
    max_false_alarms: float | None = None,
) -> tuple[float, str]:
    """An adapted model's threshold: the validation rule must hold on the job's validation
    cells too, each weighted by 1 / its inclusion probability so the sample stands for the
    job's frames (Horvitz-Thompson, Cochran ch. 5). Under a false-alarm budget the higher
    of the two thresholds is kept, under a recall target the lower one.

    Returns ``(threshold, source)`` unchanged when there is no job cell the rule can use.
    """
    if job is None or len(job) == 0:
        return threshold, source
    crack = job.is_crack
    try:
        if max_false_alarms is not None:
            t = M.weighted_thresholds(
                crack, job.screening, weights, max_false_alarm_rate=max_false_alarms
            )
            chosen = max(threshold, t)
        else:
            t = M.weighted_thresholds(crack, job.screening, weights, target_recall=target_recall)
            chosen = min(threshold, t)
    except M.MetricsError:  # no clean (or no crack) job cell: the split's rule alone
        return threshold, source
    which = "higher" if max_false_alarms is not None else "lower"
    return float(chosen), (
        f"{source}: {threshold:.4g} from the split's validation patches, {t:.4g} from the "
        f"job's {len(job)} validation cells (weighted by inclusion probability); the {which} "
        f"of the two, {chosen:.4g}, is used so the rule holds on both"
    )


def _plain(d: dict) -> dict:
    return {k: (float(v) if isinstance(v, float | np.floating) else int(v)) for k, v in d.items()}


def screen_block(is_crack: np.ndarray, p: np.ndarray, threshold: float) -> dict:
    """Screening counts and rates at a threshold, plus the share of patches flagged."""
    s = _plain(M.screening_scores(is_crack, p, threshold=threshold))
    s["flagged_share"] = (s["tp"] + s["fp"]) / max(1, is_crack.size)
    return s


def calibration_block(test: Scored, val: Scored | None, *, temperature_scaling: bool) -> dict:
    """Calibration of the argmax confidence; with ``temperature_scaling`` one temperature
    fitted on validation by NLL (report only: the probabilities used elsewhere stay as they are).

    Raises:
        ValueError: temperature scaling was asked for without validation patches.
    """
    probs, y = test.probs, test.labels
    pred = probs.argmax(1)
    conf, correct = probs.max(1).astype(float), pred == y
    out: dict[str, Any] = {
        "n_bins": 10,
        "ece": M.expected_calibration_error(conf, correct, n_bins=10),
        "nll": M.negative_log_likelihood(test.logits, y),
        "bins": M.reliability_bins(conf, correct, n_bins=10),
        "temperature": None,
    }
    if not temperature_scaling:
        return out
    if val is None or len(val) == 0:
        raise TrainkitError(
            "temperature scaling needs validation patches to fit on; the split has none"
        )
    t = M.fit_temperature(val.logits, val.labels)
    scaled = M.softmax(test.logits, temperature=t)
    conf_t, correct_t = scaled.max(1), scaled.argmax(1) == y
    out["temperature"] = {
        "value": t,
        "fitted_on": f"validation subset ({len(val)} patches), by NLL",
        "val_nll_before": M.negative_log_likelihood(val.logits, val.labels),
        "val_nll_after": M.negative_log_likelihood(val.logits, val.labels, temperature=t),
        "ece_after": M.expected_calibration_error(conf_t, correct_t, n_bins=10),
        "nll_after": M.negative_log_likelihood(test.logits, y, temperature=t),
        "bins_after": M.reliability_bins(conf_t, correct_t, n_bins=10),
        "applied_to": "report only: predictions.csv, the threshold and the exported "
        "model use the unscaled probabilities",
    }
    return out


def _breakdowns(test: Scored, flagged: np.ndarray, *, confidence: float, method: str) -> dict:
    correct = test.probs.argmax(1) == test.labels
    patch_mm = (
        np.full(len(test), np.nan) if test.patch_mm is None else np.asarray(test.patch_mm, float)
    )
    bands, band_order = M.scale_bands(patch_mm, n_bands=3)
    kw = {"confidence": confidence, "method": method}
    return {
        "by_photo": M.breakdown(test.photos, test.is_crack, flagged, correct, **kw),
        "by_group": M.breakdown(test.groups, test.is_crack, flagged, correct, **kw),
        "by_scale": M.breakdown(bands, test.is_crack, flagged, correct, order=band_order, **kw)
        if bool(np.isfinite(patch_mm).any())
        else [],
    }


def acceptance_gate(interval: M.Interval, required: float, *, confidence: float, what: str) -> dict:
    """The acceptance verdict: pass only when the interval's lower bound reaches ``required``.

    Args:
        interval: the recall interval (its ``k``/``n`` are quoted in the verdict).
        required: the lowest acceptable lower bound.
        confidence: the interval's two-sided level (for the wording).
        what: where the recall was measured, e.g. "the test subset".

    Returns:
        ``required_recall``, ``recall_lower_bound``, ``passed`` and ``verdict`` (words).
    """
    lower = interval.low
    passed = bool(np.isfinite(lower) and lower >= required)
    level = f"{confidence:.0%}"
    if not np.isfinite(lower):
        verdict = (
            f"REFUSED: {what} has no crack patches, so screening recall "
            f"cannot be bounded (required lower bound {required:.3f})."
        )
    else:
        word, relation = ("ACCEPTED", "is at least") if passed else ("REFUSED", "is below")
        verdict = (
            f"{word}: the {level} lower bound of screening recall ({lower:.3f}, "
            f"{interval.k}/{interval.n} cracks found) {relation} the required {required:.3f}."
        )
    return {
        "required_recall": float(required),
        "recall_lower_bound": lower,
        "passed": passed,
        "verdict": verdict,
    }


#: Share of validation cells the first stage must pass, of those the main network flags and
#: of the true crack cells alike.
CASCADE_PASS_SHARE = 0.995
#: Largest allowed drop of test screening recall, cascade against the main network alone.
CASCADE_MAX_RECALL_DROP = 0.005


def _highest_keeping(scores: np.ndarray, share: float) -> float:
    """The highest t with ``mean(scores >= t) >= share`` (the cells allowed below it go first)."""
    ordered = np.sort(np.asarray(scores, dtype=np.float64))
    allowed_misses = int(math.floor(round(len(ordered) * (1.0 - share), 9)))
    return float(ordered[allowed_misses])


def cascade_pass_threshold(
    stage1: np.ndarray,
    main_flagged: np.ndarray,
    is_crack: np.ndarray,
    *,
    share: float = CASCADE_PASS_SHARE,
    spare_share: float = 0.0,
) -> tuple[float | None, str]:
    """The first stage's pass threshold, chosen on validation, and how, in words.

    The highest threshold on the first stage's score (cells at or above it go on to the main
    network) that still passes at least ``share`` of the cells the main network flags AND at
    least ``share`` of the true crack cells: any higher threshold breaks one of the two.
    With ``spare_share`` > 0 it must also pass at least that share of the other validation
    cells (neither flagged nor cracks): a margin below the lowest crack scores, paid for in
    cells passed. Why: a few hundred validation cracks cannot pin the lowest 0.5 % of crack
    scores on photos not seen, so a threshold at the lowest validation crack lets test cracks
    through that the margin keeps (benchmarks/results/lab_notes.md, cascade.json).
    None when validation has neither a flagged nor a crack cell.

    Args:
        stage1: (n,) the first stage's screening probability of the validation cells.
        main_flagged: (n,) bool, the main network flags the cell at its own threshold.
        is_crack: (n,) bool, the cell holds a crack.
        share: in (0, 1].
        spare_share: in [0, 1).
    """
    stage1 = np.asarray(stage1, dtype=np.float64)
    flagged, crack = np.asarray(main_flagged, bool), np.asarray(is_crack, bool)
    if not (stage1.shape == flagged.shape == crack.shape and stage1.ndim == 1):
        raise ValueError(
            f"expected three arrays of one shape (n,), got {stage1.shape}, {flagged.shape}, "
            f"{crack.shape}"
        )
    if not 0.0 < share <= 1.0:
        raise ValueError(f"share must be in (0, 1], got {share}")
    if not 0.0 <= spare_share < 1.0:
        raise ValueError(f"spare_share must be in [0, 1), got {spare_share}")
    limits = [_highest_keeping(stage1[m], share) for m in (flagged, crack) if m.any()]
    if not limits:
        return None, "validation has no flagged and no crack cell"
    source = (
        f"validation subset, highest threshold passing at least {share:g} of the "
        f"{int(flagged.sum())} cells the main network flags and of the {int(crack.sum())} crack cells"
    )
    others = ~(flagged | crack)
    if spare_share > 0 and others.any():
        limits.append(_highest_keeping(stage1[others], spare_share))
        source += (
            f", and at least {spare_share:g} of the {int(others.sum())} other cells (a margin)"
        )
    return min(limits), source


def cascade_block(
    val: tuple[np.ndarray, np.ndarray, np.ndarray],
    test: tuple[np.ndarray, np.ndarray, np.ndarray],
    main_threshold: float,
    *,
    confidence: float = 0.95,
    method: str = "wilson",
    share: float = CASCADE_PASS_SHARE,
    spare_share: float = 0.0,
    max_recall_drop: float | None = None,
) -> dict:
    """The cascade's figures beside the main network's, and its gate.

    Args:
        val, test: (first-stage screening probability, main screening probability, is_crack)
            per cell of validation and of the evaluated subset.
        main_threshold: the main network's operating threshold (the cascade flags a cell when
            the first stage passes it and the main network flags it).
        spare_share: see :func:`cascade_pass_threshold` (the recipe's
            ``cascade.spare_pass_share``).
        max_recall_drop: the gate's largest allowed recall drop (None:
            :data:`CASCADE_MAX_RECALL_DROP`).

    Returns:
        ``pass_threshold``, ``threshold_source``, ``validation`` (passed share of flagged and of
        crack cells, share of cells passed), ``main`` and ``cascade`` (screening counts and
        rates on the evaluated subset; ``cascade`` with ``recall_interval``),
        ``passed_share`` (cells reaching the main network), ``recall_drop``, ``gate``.
    """
    if max_recall_drop is None:
        max_recall_drop = CASCADE_MAX_RECALL_DROP
    s1v, pv, cv = (np.asarray(a) for a in val)
    t, source = cascade_pass_threshold(
        s1v, pv >= main_threshold, cv, share=share, spare_share=spare_share
    )
    s1t, pt, ct = (np.asarray(a) for a in test)
    main = screen_block(ct, pt, main_threshold)
    block = {"pass_threshold": t, "threshold_source": source, "main": main}
    if t is None:
        block["gate"] = {
            "passed": False,
            "verdict": "REFUSED: the cascade's pass threshold cannot be chosen ("
            + source
            + "); the model is exported without the cascade.",
        }
        return block
    passed_v, passed_t = s1v >= t, s1t >= t
    flagged_v = pv >= main_threshold
    cascade = screen_block(ct, np.where(passed_t, pt, 0.0), main_threshold)
    ci = M.recall_interval(
        cascade["tp"], cascade["tp"] + cascade["fn"], confidence=confidence, method=method
    )
    cascade["recall_interval"] = ci.to_dict()
    drop = float(main["recall"] - cascade["recall"]) if ct.any() else float("nan")
    ok = bool(np.isfinite(drop) and drop <= max_recall_drop + 1e-12)
    word, relation = ("ACCEPTED", "within") if ok else ("REFUSED", "not within")
    verdict = (
        (
            f"{word}: the cascade's screening recall on the evaluated subset ({cascade['recall']:.3f}, "
            f"{cascade['tp']}/{cascade['tp'] + cascade['fn']} cracks found) is {relation} "
            f"{max_recall_drop:g} of the main network's ({main['recall']:.3f})"
            + ("." if ok else "; the model is exported without the cascade.")
        )
        if ct.any()
        else (
            "REFUSED: the evaluated subset has no crack patches, so the cascade's recall cannot be "
            "compared; the model is exported without the cascade."
        )
    )
    block.update(
        validation={
            "passed_of_flagged": float(passed_v[flagged_v].mean()) if flagged_v.any() else None,
            "passed_of_cracks": float(passed_v[cv].mean()) if cv.any() else None,
            "passed_share": float(passed_v.mean()),
        },
        cascade=cascade,
        passed_share=float(passed_t.mean()),
        recall_drop=drop,
        gate={"max_recall_drop": max_recall_drop, "passed": ok, "verdict": verdict},
    )
    return block


def score_predictions(
    test: Scored,
    val: Scored | None,
    *,
    class_names: list[str],
    threshold: float,
    threshold_source: str,
    split: str = "test",
    confidence: float = 0.95,
    method: str = "wilson",
    target_recall: float | None = 0.95,
    max_false_alarms: float | None = None,
    require_recall: float | None = None,
    temperature_scaling: bool = False,
) -> dict:
    """The metrics of one evaluated subset (every key but provenance and comparison).

    Args:
        test: the evaluated patches' predictions.
        val: validation predictions (for the validation view and temperature), or None.
        class_names: the class set's names in index order.
        threshold: the operating threshold on the screening probability.
        threshold_source: how it was chosen, in words.
        split: the evaluated subset's name ('test' or 'val').
        confidence: two-sided level of every interval.
        method: interval method ('wilson' or 'clopper-pearson').
        target_recall: the recall rule that chose the threshold (None under a budget).
        max_false_alarms: the false-alarm budget that chose it, if that rule was used.
        require_recall: the acceptance gate's lowest recall bound, or None for no gate.
        temperature_scaling: fit and report a temperature (see :func:`calibration_block`).
    """
    y, probs = test.labels, test.probs
    pred = probs.argmax(1)
    labels = list(range(len(class_names)))
    cm = M.confusion_matrix(y, pred, labels=labels)
    p_crack = test.screening
    screen = screen_block(test.is_crack, p_crack, threshold)
    recall_ci = M.recall_interval(
        screen["tp"], screen["tp"] + screen["fn"], confidence=confidence, method=method
    )
    calibration = calibration_block(test, val, temperature_scaling=temperature_scaling)
    gate = None
    if require_recall is not None:
        gate = acceptance_gate(
            recall_ci, require_recall, confidence=confidence, what=f"the {split} subset"
        )
    return {
        "metrics_version": METRICS_VERSION,
        "split": split,
        "patches": int(len(test)),
        "photos": len(set(test.photos)),
        "class_names": list(class_names),
        "accuracy": float(np.mean(pred == y)),
        "confusion_matrix": cm.tolist(),
        "confusion_matrix_row_normalised": M.row_normalise(cm).round(4).tolist(),
        "per_class": M.per_class_report(
            y, pred, labels=labels, class_names=class_names, confidence=confidence, method=method
        ),
        "screening": {
            **screen,
            "threshold": threshold,
            "threshold_source": threshold_source,
            "threshold_independent": split != "val",
            "target_recall": None if max_false_alarms is not None else float(target_recall),
            "max_false_alarms": None if max_false_alarms is None else float(max_false_alarms),
            "recall_ci_low": recall_ci.low,
            "recall_ci_high": recall_ci.high,
            "recall_interval": recall_ci.to_dict(),
            "validation": screen_block(val.is_crack, val.screening, threshold)
            if val is not None and len(val)
            else None,
            "at_default_threshold": screen_block(test.is_crack, p_crack, 0.5),
        },
        "expected_calibration_error": float(calibration["ece"]),
        "calibration": calibration,
        **_breakdowns(test, p_crack >= threshold, confidence=confidence, method=method),
        "interval_method": method,
        "confidence": float(confidence),
        "gate": gate,
        "caution": CAUTION,
    }
