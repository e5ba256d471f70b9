"""Run a trained model on a split and write predictions, metrics and the report.

Writes into ``EXP/evaluation/``: ``predictions.csv`` (one row per patch; every
figure can be recomputed from it), ``metrics.json``, the plots and
``report.html``. The operating threshold is chosen on the validation subset for
a target screening recall and then reported on the evaluated subset.
"""

from __future__ import annotations

import csv
import json
import os
from pathlib import Path

import numpy as np

from . import metrics as M
from .data import PatchSet, load_patch_set
from .splits import check_no_leak
from .taxonomy import ClassSet
from .workspace import Workspace

__all__ = ["evaluate_experiment", "EvaluationError", "screening_probability"]

CAUTION = (
    "This screener is a triage aid that decides which photos and regions a person looks at "
    "first; it is not an inspection. Its figures hold only for photos like its test set "
    "(same cameras, surfaces, lighting and scale). Defer to local codes and to licensed engineers "
    "for any judgement about a structure."
)


class EvaluationError(ValueError):
    """Evaluation cannot run; the message says why and what to do."""


def screening_probability(probs: np.ndarray) -> np.ndarray:
    """Screening probability of each patch: 1 - P(none) (class 0 is always no-crack)."""
    return np.clip(1.0 - probs[:, 0].astype(np.float64), 0.0, 1.0)


def _write_predictions(path: Path, data: PatchSet, probs: np.ndarray, class_set: ClassSet) -> None:
    # float32 probabilities with 9 significant digits and the float64 screening
    # probability in round-trip form, so thresholds recompute exactly.
    tmp = path.with_suffix(".csv.tmp")
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
        scr = screening_probability(probs)
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
    os.replace(tmp, path)


def evaluate_experiment(
    exp_dir: str | Path,
    *,
    split: str = "test",
    target_recall: float = 0.95,
    require_recall: float | None = None,
    confidence: float = 0.95,
    interval_method: str = "wilson",
    workspace: str | Path | None = None,
) -> dict:
    """Evaluate an experiment's checkpoint on one subset; write the evaluation folder.

    Args:
        exp_dir: experiment folder with ``checkpoint.pt`` and ``experiment.json``.
        split: subset to evaluate ('test' by default, or 'val').
        target_recall: screening recall the operating threshold must reach on validation.
        require_recall: acceptance gate: pass only if the lower confidence bound of
            screening recall is at least this.
        confidence: two-sided confidence level of the intervals.
        interval_method: 'wilson' or 'clopper-pearson'.
        workspace: workspace folder, if it moved since training.

    Returns:
        The metrics dictionary that was written to metrics.json.
    """
    from .report import write_report
    from .training import load_checkpoint, predict_proba

    exp = Path(exp_dir)
    model, ckpt, class_set = load_checkpoint(exp)
    ws_path = Path(workspace) if workspace else Path(ckpt["experiment"]["workspace"])
    ws = Workspace.open(ws_path)
    check_no_leak(ws.patches())
    data = load_patch_set(ws, split, class_set, input_px=ckpt["input_px"])
    if len(data) == 0:
        raise EvaluationError(f"the {split!r} subset of {ws.root} has no labelled patches")
    val = load_patch_set(ws, "val", class_set, input_px=ckpt["input_px"])
    nc = class_set.num_classes
    probs = predict_proba(model, data.images, num_classes=nc)
    val_probs = predict_proba(model, val.images, num_classes=nc) if len(val) else None

    # Operating threshold: chosen on validation for the target recall, reported on `split`.
    threshold, threshold_source = 0.5, "default 0.5 (validation has no cracks)"
    if val_probs is not None and np.any(val.labels != 0):
        threshold = M.threshold_for_recall(
            val.labels != 0, screening_probability(val_probs), target_recall=target_recall
        )
        threshold_source = f"validation subset, target screening recall {target_recall:g}"

    out = exp / "evaluation"
    out.mkdir(parents=True, exist_ok=True)
    _write_predictions(out / "predictions.csv", data, probs, class_set)

    y, pred = data.labels, probs.argmax(1)
    labels = list(range(nc))
    cm = M.confusion_matrix(y, pred, labels=labels)
    per_class = M.per_class_report(
        y,
        pred,
        labels=labels,
        class_names=list(class_set.names),
        confidence=confidence,
        method=interval_method,
    )
    p_crack = screening_probability(probs)
    is_crack = y != 0
    screen = M.screening_scores(is_crack, p_crack, threshold=threshold)
    recall_ci = M.recall_interval(
        int(screen["tp"]),
        int(screen["tp"] + screen["fn"]),
        confidence=confidence,
        method=interval_method,
    )
    conf = probs.max(1)
    ece = M.expected_calibration_error(conf, pred == y, n_bins=10)

    gate = None
    if require_recall is not None:
        lower = recall_ci.low
        passed = bool(np.isfinite(lower) and lower >= require_recall)
        gate = {
            "required_recall": require_recall,
            "recall_lower_bound": lower,
            "passed": passed,
            "verdict": (
                f"ACCEPTED: the {confidence:.0%} lower bound of screening recall "
                f"({lower:.3f}) is at least the required {require_recall:.3f}."
                if passed
                else f"REFUSED: the {confidence:.0%} lower bound of screening recall "
                f"({lower:.3f}) is below the required {require_recall:.3f}."
            ),
        }

    result = {
        "split": split,
        "patches": int(len(data)),
        "photos": len(set(data.photos)),
        "class_names": list(class_set.names),
        "accuracy": float(np.mean(pred == y)),
        "confusion_matrix": cm.tolist(),
        "confusion_matrix_row_normalised": M.row_normalise(cm).round(4).tolist(),
        "per_class": per_class,
        "screening": {
            "threshold": float(threshold),
            "threshold_source": threshold_source,
            **{
                k: (float(v) if isinstance(v, float | np.floating) else int(v))
                for k, v in screen.items()
            },
            "recall_interval": recall_ci.to_dict(),
        },
        "expected_calibration_error": float(ece),
        "interval_method": interval_method,
        "confidence": confidence,
        "gate": gate,
        "checkpoint_epoch": ckpt.get("best_epoch"),
        "data_digest": ckpt["experiment"].get("data_digest"),
        "caution": CAUTION,
    }
    tmp = out / "metrics.json.tmp"
    tmp.write_text(json.dumps(result, indent=2, default=_json_default), encoding="utf-8")
    os.replace(tmp, out / "metrics.json")
    write_report(
        out, result, data=data, probs=probs, class_set=class_set, experiment=ckpt["experiment"]
    )
    return result


def _json_default(o):
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
