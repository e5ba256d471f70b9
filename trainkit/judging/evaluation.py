"""Run a trained model on a split and write predictions, metrics and the report.

Writes into ``EXP/evaluation/``: ``predictions.csv`` (one row per patch; every
figure can be recomputed from it), ``metrics.json``, the plots and
``report.html``; with ``against`` also ``disagreements.csv``. The operating
threshold is chosen on the validation subset for a target screening recall and
then reported on the evaluated subset.

``metrics.json`` keys (stable; new keys may be added, none is renamed without a
migration note). Ratios whose denominator is zero (e.g. recall of a class with no
patches) are ``null``; intervals name their method and carry ``k``/``n``.

=====================================  ==========================================================
key                                    meaning
=====================================  ==========================================================
``metrics_version``                    1; bumped only on a breaking change of this table
``split``                              evaluated subset: ``test`` or ``val``
``patches`` / ``photos``               number of evaluated patches / distinct photos
``class_names``                        class names in index order; index 0 is ``none``
``accuracy``                           share of patches whose argmax class is the true class
``confusion_matrix``                   counts, rows = true class, columns = predicted class
``confusion_matrix_row_normalised``    each row divided by its sum (4 decimals; empty rows 0)
``per_class[i]``                       ``name``, ``index``, ``precision``, ``recall``, ``f1``,
                                       ``support``, ``recall_ci_low``, ``recall_ci_high``,
                                       ``recall_interval`` {low, high, method, confidence, k, n}
``interval_method`` / ``confidence``   ``wilson`` or ``clopper-pearson``; two-sided level
``screening``                          crack vs none, flagged when ``1 - P(none) >= threshold``:
                                       ``threshold``, ``threshold_source``,
                                       ``threshold_independent`` (false when chosen on the
                                       evaluated patches), ``target_recall`` and
                                       ``max_false_alarms`` (the rule used; the other is
                                       null), ``tp``, ``fn``,
                                       ``fp``, ``tn``, ``recall``, ``recall_ci_low``,
                                       ``recall_ci_high``, ``recall_interval``, ``specificity``,
                                       ``false_alarm_rate`` (= fp / (fp + tn)), ``precision``,
                                       ``flagged_share`` (share of all patches flagged)
``screening.validation``               the same counts and rates on validation at the threshold
                                       (``null`` without validation patches)
``screening.at_default_threshold``     the counts and rates at 0.5, to show what the target
                                       recall costs in false alarms
``expected_calibration_error``         ECE of the argmax confidence, 10 equal-width bins
``calibration``                        ``n_bins``, ``ece``, ``bins`` (lo, hi, count, accuracy,
                                       confidence), ``nll``, ``temperature`` (``null`` unless
                                       temperature scaling was asked for: ``value``,
                                       ``fitted_on``, ``ece_after``, ``nll_after``, ``bins_after``)
``by_photo`` / ``by_group`` /          one row per photo / group (site, structure) / patch-width
``by_scale``                           band: ``key``, ``patches``, ``cracks``, ``cracks_found``,
                                       ``recall``, ``recall_ci_low``, ``recall_ci_high``,
                                       ``clean``, ``false_alarms``, ``false_alarm_rate``,
                                       ``accuracy``; ``by_scale`` is ``[]`` without a scale
``comparison``                         ``null``, or the paired comparison with ``against``:
                                       ``experiment_b``, ``patches``, ``cracks``, ``a``/``b``
                                       (threshold, recall, false_alarm_rate, accuracy),
                                       ``recall_difference`` (a - b), ``mcnemar_recall`` and
                                       ``mcnemar_accuracy`` {b, c, statistic, p_value, method},
                                       ``disagreements``, ``disagreements_csv``
``gate``                               ``null``, or ``required_recall``,
                                       ``recall_lower_bound``, ``passed``, ``verdict``
``experiment`` / ``workspace``         absolute paths of the experiment and the workspace used
``model``                              ``checkpoint``, ``backbone``, ``epoch``
``checkpoint_epoch`` / ``data_digest``  best epoch; SHA-256 of the training and validation data
``evaluated_digest``                   SHA-256 of the evaluated patches (photo, box, label)
``kit_version`` / ``created``          trainkit version; UTC time of the evaluation
``caution``                            the triage-aid caution that every output carries
=====================================  ==========================================================
"""

from __future__ import annotations

import csv
import datetime as _dt
import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from trainkit.core.contract import screening_probability
from trainkit.core.fsutil import atomic_path, atomic_write_json
from trainkit.core.taxonomy import ClassSet
from trainkit.judging import metrics as M
from trainkit.labels.splits import check_no_leak
from trainkit.labels.workspace import Workspace
from trainkit.learning.data import PatchSet, load_patch_set
from trainkit.learning.experiment import Experiment

__all__ = ["evaluate_experiment", "EvaluationError", "CAUTION"]

METRICS_VERSION = 1

CAUTION = (
    "This screener is a triage aid that decides which photos and regions a person looks at "
    "first; it is not an inspection. Its figures hold only for photos like its test set "
    "(same cameras, surfaces, lighting and scale). Defer to local codes and to licensed engineers "
    "for any judgement about a structure."
)


class EvaluationError(ValueError):
    """Evaluation cannot run; the message says why and what to do."""


def _write_predictions(path: Path, data: PatchSet, probs: np.ndarray, class_set: ClassSet) -> None:
    # float32 probabilities with 9 significant digits and the float64 screening
    # probability in round-trip form, so thresholds recompute exactly.
    with atomic_path(path) as tmp:
        names = class_set.names
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(
                [
                    "patch_id",
                    "photo",
                    "group",
                    "true",
                    "predicted",
                    *[f"p_{n}" for n in names],
                    "screening_probability",
                ]
            )
            pred = probs.argmax(1)
            scr = screening_probability(probs.astype(np.float64))
            for i in range(len(data)):
                w.writerow(
                    [
                        int(data.patch_ids[i]),
                        data.photos[i],
                        data.groups[i],
                        names[data.labels[i]],
                        names[pred[i]],
                        *[f"{p:.9g}" for p in probs[i]],
                        repr(float(scr[i])),
                    ]
                )


# --------------------------------------------------------------------------- running a model


@dataclass
class _Run:
    """One experiment's model applied to the evaluated subset and to validation."""

    exp: Path
    ckpt: dict
    class_set: ClassSet
    ws: Workspace
    data: PatchSet
    keys: list[tuple[str, tuple[int, int, int, int]]]
    logits: np.ndarray
    probs: np.ndarray
    val: PatchSet
    val_logits: np.ndarray
    val_probs: np.ndarray
    threshold: float
    threshold_source: str


def _predict_logits(model, images: np.ndarray, num_classes: int, batch_size: int = 64):
    """Logits and softmax probabilities (float32), batched as in training.predict_proba."""
    import torch

    model.eval()
    logits = [np.zeros((0, num_classes), dtype=np.float32)]
    probs = [np.zeros((0, num_classes), dtype=np.float32)]
    with torch.no_grad():
        for i in range(0, len(images), batch_size):
            z = model(torch.from_numpy(images[i : i + batch_size]))
            logits.append(z.numpy().astype(np.float32))
            probs.append(torch.softmax(z, dim=1).numpy())
    return np.concatenate(logits), np.concatenate(probs).astype(np.float32)


def _run_experiment(
    exp_dir: str | Path,
    split: str,
    target_recall: float,
    workspace: str | Path | None,
    max_false_alarms: float | None = None,
) -> _Run:
    from trainkit.learning.network import load_checkpoint

    exp = Path(exp_dir).resolve()
    model, ckpt, class_set = load_checkpoint(exp)
    ws_path = Path(workspace) if workspace else Path(ckpt["experiment"]["workspace"])
    if not ws_path.is_dir():
        raise EvaluationError(
            f"workspace {ws_path} of experiment {exp} does not exist; pass --workspace"
        )
    ws = Workspace.open(ws_path)
    records = ws.patches()
    check_no_leak(records)
    data = load_patch_set(ws, split, class_set, input_px=ckpt["input_px"])
    if len(data) == 0:
        raise EvaluationError(f"the {split!r} subset of {ws.root} has no labelled patches")
    box_of = {r.id: r.box for r in records}
    keys = [(p, tuple(box_of[int(i)])) for p, i in zip(data.photos, data.patch_ids, strict=True)]
    val = load_patch_set(ws, "val", class_set, input_px=ckpt["input_px"])
    nc = class_set.num_classes
    logits, probs = _predict_logits(model, data.images, nc)
    val_logits, val_probs = _predict_logits(model, val.images, nc)

    # Operating threshold: chosen on validation for the target recall, reported on `split`.
    threshold, source = 0.5, "default 0.5 (validation has no crack patches)"
    if max_false_alarms is not None:
        if len(val) and np.any(val.labels == 0):
            threshold = M.threshold_for_false_alarms(
                val.labels != 0,
                screening_probability(val_probs.astype(np.float64)),
                max_false_alarm_rate=max_false_alarms,
            )
            source = f"validation subset, false-alarm rate at most {max_false_alarms:g}"
        else:
            source = "default 0.5 (validation has no clean patches)"
    elif len(val) and np.any(val.labels != 0):
        threshold = M.threshold_for_recall(
            val.labels != 0,
            screening_probability(val_probs.astype(np.float64)),
            target_recall=target_recall,
        )
        source = f"validation subset, target screening recall {target_recall:g}"
    return _Run(
        exp, ckpt, class_set, ws, data, keys, logits, probs, val, val_logits, val_probs,
        float(threshold), source,
    )  # fmt: skip


def _evaluated_digest(keys, labels: np.ndarray, names: list[str]) -> str:
    h = hashlib.sha256()
    for (photo, box), y in sorted(zip(keys, labels.tolist(), strict=True)):
        h.update(f"{photo}|{box}|{names[y]}\n".encode())
    return h.hexdigest()


def _plain(d: dict) -> dict:
    return {k: (float(v) if isinstance(v, float | np.floating) else int(v)) for k, v in d.items()}


def _screen_block(is_crack: np.ndarray, p: np.ndarray, threshold: float) -> dict:
    s = _plain(M.screening_scores(is_crack, p, threshold=threshold))
    s["flagged_share"] = (s["tp"] + s["fp"]) / max(1, is_crack.size)
    return s


# --------------------------------------------------------------------------- comparison


def _compare(a: _Run, b: _Run, out: Path) -> tuple[dict, np.ndarray]:
    """Paired comparison of two runs on the same patches; writes disagreements.csv."""
    if list(a.class_set.names) != list(b.class_set.names):
        raise EvaluationError(
            "cannot compare: the class sets differ "
            f"({list(a.class_set.names)} in {a.exp} vs {list(b.class_set.names)} in {b.exp})"
        )
    names = list(a.class_set.names)
    ka = dict(zip(a.keys, a.data.labels.tolist(), strict=True))
    kb = dict(zip(b.keys, b.data.labels.tolist(), strict=True))
    only_a, only_b = set(ka) - set(kb), set(kb) - set(ka)
    relabelled = [k for k in set(ka) & set(kb) if ka[k] != kb[k]]
    if only_a or only_b or relabelled:
        raise EvaluationError(
            f"cannot compare {a.exp} with {b.exp}: their evaluated patches differ "
            f"({len(only_a)} only in the first, {len(only_b)} only in the second, "
            f"{len(relabelled)} with different labels); both must be evaluated on the same "
            "workspace split with the same labels"
        )
    pos_b = {k: i for i, k in enumerate(b.keys)}
    order = np.array([pos_b[k] for k in a.keys], dtype=np.int64)
    y = a.data.labels
    crack = y != 0
    pa, pb = (
        screening_probability(a.probs.astype(np.float64)),
        screening_probability(b.probs.astype(np.float64))[order],
    )
    fa, fb = pa >= a.threshold, pb >= b.threshold
    ca_cls, cb_cls = a.probs.argmax(1), b.probs.argmax(1)[order]
    mc_recall = M.mcnemar_test(fa[crack], fb[crack])
    mc_acc = M.mcnemar_test(ca_cls == y, cb_cls == y)
    # Disagreements: screening decision differs, or the predicted class differs.
    screen_diff = fa != fb
    disagree = np.flatnonzero(screen_diff | (ca_cls != cb_cls))
    rank = np.where(screen_diff & crack, 0, np.where(screen_diff, 1, 2))
    disagree = disagree[np.lexsort((-np.abs(pa - pb)[disagree], rank[disagree]))]

    def side(p: np.ndarray, cls: np.ndarray, run: _Run) -> dict:
        s = M.screening_scores(crack, p, threshold=run.threshold)
        return {
            "experiment": str(run.exp),
            "threshold": run.threshold,
            "threshold_source": run.threshold_source,
            "recall": s["recall"],
            "cracks_found": s["tp"],
            "false_alarm_rate": s["false_alarm_rate"],
            "false_alarms": s["fp"],
            "accuracy": float(np.mean(cls == y)),
        }

    sa = side(pa, ca_cls, a)
    sb = side(pb, cb_cls, b)
    csv_path = out / "disagreements.csv"
    with atomic_path(csv_path) as tmp:
        with tmp.open("w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(
                [
                    "patch_id", "photo", "group", "true", "predicted_a", "predicted_b",
                    "screening_probability_a", "screening_probability_b", "flagged_a", "flagged_b",
                    "screening_right",
                ]
            )  # fmt: skip
            for i in disagree:
                right_a, right_b = fa[i] == crack[i], fb[i] == crack[i]
                who = {(1, 1): "both", (1, 0): "a", (0, 1): "b", (0, 0): "neither"}
                w.writerow(
                    [
                        int(a.data.patch_ids[i]), a.data.photos[i], a.data.groups[i], names[y[i]],
                        names[ca_cls[i]], names[cb_cls[i]], repr(float(pa[i])), repr(float(pb[i])),
                        int(fa[i]), int(fb[i]), who[(int(right_a), int(right_b))],
                    ]
                )  # fmt: skip
    result = {
        "experiment_b": str(b.exp),
        "patches": int(y.size),
        "cracks": int(crack.sum()),
        "a": sa,
        "b": sb,
        "recall_difference": sa["recall"] - sb["recall"],
        "accuracy_difference": sa["accuracy"] - sb["accuracy"],
        "mcnemar_recall": mc_recall,
        "mcnemar_accuracy": mc_acc,
        "disagreements": int(disagree.size),
        "screening_disagreements": int(screen_diff.sum()),
        "disagreements_csv": csv_path.name,
    }
    extra = {"order": order, "index": disagree, "pa": pa, "pb": pb, "fa": fa, "fb": fb}
    return result, extra


# --------------------------------------------------------------------------- entry point


def evaluate_experiment(
    exp_dir: str | Path,
    *,
    split: str = "test",
    target_recall: float = 0.95,
    require_recall: float | None = None,
    confidence: float = 0.95,
    interval_method: str = "wilson",
    workspace: str | Path | None = None,
    against: str | Path | None = None,
    temperature_scaling: bool = False,
    max_false_alarms: float | None = None,
) -> dict:
    """Evaluate an experiment's checkpoint on one subset; write the evaluation folder.

    Args:
        exp_dir: experiment folder with ``checkpoint.pt`` and ``experiment.json``.
        split: subset to evaluate ('test' by default, or 'val').
        target_recall: screening recall the operating threshold must reach on validation.
        require_recall: acceptance gate: pass only if the lower confidence bound of
            screening recall is at least this.
        confidence: two-sided confidence level of the intervals, in (0, 1).
        interval_method: 'wilson' or 'clopper-pearson' ('exact' is an alias).
        workspace: workspace folder, if it moved since training.
        against: a second experiment to compare with on the same patches (its own
            threshold is chosen on validation for the same target recall). It reads
            ``workspace`` when given, else the workspace it was trained on.
        temperature_scaling: fit one temperature on validation and report the calibration
            before and after. Report only: predictions, threshold and export are unchanged.
        max_false_alarms: instead of a target recall, choose the operating threshold on
            validation as the lowest one whose false-alarm rate there is at most this.

    Returns:
        The metrics dictionary that was written to metrics.json (keys: module docstring).

    Raises:
        EvaluationError: on bad options, an empty subset, or experiments that cannot be
            compared.
    """
    from trainkit import __version__
    from trainkit.judging.report import write_report

    if split not in ("test", "val"):
        raise EvaluationError(f"expected split 'test' or 'val', got {split!r}")
    if not 0.0 < float(confidence) < 1.0:
        raise EvaluationError(f"expected confidence in (0, 1), got {confidence}")
    method = M.recall_interval(0, 1, method=interval_method).method  # validates, canonical name
    if require_recall is not None and not 0.0 <= float(require_recall) <= 1.0:
        raise EvaluationError(f"expected require_recall in [0, 1], got {require_recall}")
    if max_false_alarms is not None and not 0.0 <= float(max_false_alarms) < 1.0:
        raise EvaluationError(f"expected max_false_alarms in [0, 1), got {max_false_alarms}")

    run = _run_experiment(exp_dir, split, target_recall, workspace, max_false_alarms)
    data, probs, class_set, ckpt = run.data, run.probs, run.class_set, run.ckpt
    names = list(class_set.names)
    threshold = run.threshold
    out = run.exp / "evaluation"
    out.mkdir(parents=True, exist_ok=True)
    _write_predictions(out / "predictions.csv", data, probs, class_set)

    y, pred = data.labels, probs.argmax(1)
    labels = list(range(class_set.num_classes))
    cm = M.confusion_matrix(y, pred, labels=labels)
    per_class = M.per_class_report(
        y, pred, labels=labels, class_names=names, confidence=confidence, method=method
    )
    p_crack = screening_probability(probs.astype(np.float64))
    is_crack = y != 0
    screen = _screen_block(is_crack, p_crack, threshold)
    recall_ci = M.recall_interval(
        screen["tp"], screen["tp"] + screen["fn"], confidence=confidence, method=method
    )
    val_screen = None
    if len(run.val):
        val_screen = _screen_block(
            run.val.labels != 0, screening_probability(run.val_probs.astype(np.float64)), threshold
        )

    # Calibration of the argmax confidence; optional temperature fitted on validation.
    conf = probs.max(1).astype(float)
    correct = pred == y
    ece = M.expected_calibration_error(conf, correct, n_bins=10)
    calibration: dict[str, Any] = {
        "n_bins": 10,
        "ece": ece,
        "nll": M.negative_log_likelihood(run.logits, y),
        "bins": M.reliability_bins(conf, correct, n_bins=10),
        "temperature": None,
    }
    if temperature_scaling:
        if len(run.val) == 0:
            raise EvaluationError(
                "temperature scaling needs validation patches to fit on; the split has none"
            )
        t = M.fit_temperature(run.val_logits, run.val.labels)
        scaled = M.softmax(run.logits, temperature=t)
        conf_t = scaled.max(1)
        correct_t = scaled.argmax(1) == y
        calibration["temperature"] = {
            "value": t,
            "fitted_on": f"validation subset ({len(run.val)} patches), by NLL",
            "val_nll_before": M.negative_log_likelihood(run.val_logits, run.val.labels),
            "val_nll_after": M.negative_log_likelihood(
                run.val_logits, run.val.labels, temperature=t
            ),
            "ece_after": M.expected_calibration_error(conf_t, correct_t, n_bins=10),
            "nll_after": M.negative_log_likelihood(run.logits, y, temperature=t),
            "bins_after": M.reliability_bins(conf_t, correct_t, n_bins=10),
            "applied_to": "report only: predictions.csv, the threshold and the exported "
            "model use the unscaled probabilities",
        }

    flagged = p_crack >= threshold
    bands, band_order = M.scale_bands(data.patch_mm, n_bands=3)
    has_scale = bool(np.isfinite(data.patch_mm).any())
    by = {
        "by_photo": M.breakdown(
            data.photos, is_crack, flagged, correct, confidence=confidence, method=method
        ),
        "by_group": M.breakdown(
            data.groups, is_crack, flagged, correct, confidence=confidence, method=method
        ),
        "by_scale": M.breakdown(
            bands, is_crack, flagged, correct, order=band_order, confidence=confidence,
            method=method,
        )
        if has_scale
        else [],
    }  # fmt: skip

    comparison, compare_extra, run_b = None, None, None
    if against is not None:
        # The second experiment reads the same workspace when one was given (it moved).
        run_b = _run_experiment(against, split, target_recall, workspace, max_false_alarms)
        comparison, compare_extra = _compare(run, run_b, out)

    gate = None
    if require_recall is not None:
        lower = recall_ci.low
        passed = bool(np.isfinite(lower) and lower >= require_recall)
        level = f"{confidence:.0%}"
        if not np.isfinite(lower):
            verdict = (
                f"REFUSED: the {split} subset has no crack patches, so screening recall "
                f"cannot be bounded (required lower bound {require_recall:.3f})."
            )
        elif passed:
            verdict = (
                f"ACCEPTED: the {level} lower bound of screening recall ({lower:.3f}, "
                f"{recall_ci.k}/{recall_ci.n} cracks found) is at least the required "
                f"{require_recall:.3f}."
            )
        else:
            verdict = (
                f"REFUSED: the {level} lower bound of screening recall ({lower:.3f}, "
                f"{recall_ci.k}/{recall_ci.n} cracks found) is below the required "
                f"{require_recall:.3f}."
            )
        gate = {
            "required_recall": float(require_recall),
            "recall_lower_bound": lower,
            "passed": passed,
            "verdict": verdict,
        }

    default_screen = _screen_block(is_crack, p_crack, 0.5)
    result = {
        "metrics_version": METRICS_VERSION,
        "split": split,
        "patches": int(len(data)),
        "photos": len(set(data.photos)),
        "class_names": names,
        "accuracy": float(np.mean(correct)),
        "confusion_matrix": cm.tolist(),
        "confusion_matrix_row_normalised": M.row_normalise(cm).round(4).tolist(),
        "per_class": per_class,
        "screening": {
            **screen,
            "threshold": threshold,
            "threshold_source": run.threshold_source,
            "threshold_independent": split != "val",
            "target_recall": None if max_false_alarms is not None else float(target_recall),
            "max_false_alarms": None if max_false_alarms is None else float(max_false_alarms),
            "recall_ci_low": recall_ci.low,
            "recall_ci_high": recall_ci.high,
            "recall_interval": recall_ci.to_dict(),
            "validation": val_screen,
            "at_default_threshold": default_screen,
        },
        "expected_calibration_error": float(ece),
        "calibration": calibration,
        **by,
        "interval_method": method,
        "confidence": float(confidence),
        "comparison": comparison,
        "gate": gate,
        "experiment": str(run.exp),
        "workspace": str(run.ws.root.resolve()),
        "model": {
            "checkpoint": str(run.exp / "checkpoint.pt"),
            "backbone": ckpt.get("config", {}).get("backbone"),
            "epoch": ckpt.get("best_epoch"),
        },
        "checkpoint_epoch": ckpt.get("best_epoch"),
        "data_digest": ckpt["experiment"].get("data_digest"),
        "evaluated_digest": _evaluated_digest(run.keys, y, names),
        "kit_version": __version__,
        "created": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": CAUTION,
    }
    # Undefined ratios (nan) are written as JSON null, so any JSON reader can load the file.
    result = _nan_to_none(json.loads(json.dumps(result, default=_json_default)))
    atomic_write_json(out / Experiment.METRICS, result, allow_nan=False)
    write_report(
        out,
        result,
        data=data,
        probs=probs,
        class_set=class_set,
        experiment=ckpt["experiment"],
        comparison_images=(None if compare_extra is None else data.images[compare_extra["index"]]),
        comparison_rows=None if compare_extra is None else _comparison_rows(compare_extra, data),
    )
    if comparison is None:
        (out / "disagreements.csv").unlink(missing_ok=True)
        (out / "disagreements.png").unlink(missing_ok=True)
    return result


def _comparison_rows(extra: dict, data: PatchSet) -> list[dict]:
    rows = []
    for i in extra["index"]:
        rows.append(
            {
                "patch_id": int(data.patch_ids[i]),
                "crack": bool(data.labels[i] != 0),
                "pa": float(extra["pa"][i]),
                "pb": float(extra["pb"][i]),
                "fa": bool(extra["fa"][i]),
                "fb": bool(extra["fb"][i]),
            }
        )
    return rows


def _nan_to_none(o: Any) -> Any:
    if isinstance(o, float) and not math.isfinite(o):
        return None
    if isinstance(o, dict):
        return {k: _nan_to_none(v) for k, v in o.items()}
    if isinstance(o, list):
        return [_nan_to_none(v) for v in o]
    return o


def _json_default(o):
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, np.bool_):
        return bool(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
