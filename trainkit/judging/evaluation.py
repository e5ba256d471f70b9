"""Evaluate an experiment: run its model on a subset, score it, write predictions, metrics and report.

Writes into ``EXP/evaluation/``: ``predictions.csv`` (one row per patch; every
figure can be recomputed from it), ``metrics.json``, the plots and
``report.html``; with ``against`` also ``disagreements.csv``. The operating
threshold is chosen on the validation subset so that a target screening recall holds
with stated confidence (:func:`trainkit.judging.scoring.choose_threshold`) and then
reported on the evaluated subset. The figures come from
:func:`trainkit.judging.scoring.score_predictions` (pure) and the comparison from
:mod:`trainkit.judging.comparison`; this module runs the model and writes the files.

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
``screening.promise``                  under a target recall, what the threshold promises:
                                       ``threshold`` (the validation rule's), ``target``,
                                       ``confidence``, ``cracks`` (validation cracks, n),
                                       ``below`` (k: the k-th lowest crack score),
                                       ``achieved_confidence``, ``recall_bound``,
                                       ``validation_recall``, ``kept`` (false: too few
                                       cracks, no promise), ``cracks_needed``,
                                       ``effective_cracks`` and ``photo_correlation`` (the
                                       cracks counted for the photos they cluster in),
                                       ``operating_threshold``; ``null`` under a budget
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
``cascade``                            ``null`` without a first stage; else the two-stage figures
                                       (:func:`trainkit.judging.scoring.cascade_block`):
                                       ``pass_threshold``, ``threshold_source``, ``validation``
                                       (``passed_of_flagged``, ``passed_of_cracks``,
                                       ``passed_share``), ``main`` and ``cascade`` (screening
                                       counts and rates at the main threshold; what the exported
                                       file does is ``cascade`` when its gate passed),
                                       ``passed_share`` (cells reaching the main network),
                                       ``recall_drop``, ``gate`` {``max_recall_drop``,
                                       ``passed``, ``verdict``}, ``network``, ``loss``,
                                       ``training_seconds``
``experiment`` / ``workspace``         absolute paths of the experiment and the workspace used
``model``                              ``checkpoint``, ``backbone``, ``epoch``, ``weights`` (it started from)
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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit import metrics as M
from trainkit.core.caution import CAUTION
from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path, atomic_write_json
from trainkit.core.jsonsafe import json_ready
from trainkit.core.taxonomy import ClassSet
from trainkit.core.textsafe import csv_cell
from trainkit.judging.comparison import (
    ComparisonError,
    Side,
    paired_comparison,
    write_disagreements,
)
from trainkit.judging.scoring import (
    DEFAULT_PROMISE_CONFIDENCE,
    Scored,
    cascade_block,
    choose_threshold,
    score_predictions,
    threshold_for_job_too,
)
from trainkit.labels.splits import check_no_leak
from trainkit.learning.adapt import load_subset
from trainkit.learning.data import PatchSet, load_patch_set
from trainkit.store.workspace import Workspace

__all__ = ["evaluate_experiment", "EvaluationOptions", "EvaluationError", "CAUTION"]


class EvaluationError(TrainkitError):
    """Evaluation cannot run; the message says why and what to do."""


@dataclass(frozen=True)
class EvaluationOptions:
    """How to evaluate (every field checked on creation).

    Attributes:
        split: subset to evaluate ('test' by default, or 'val').
        target_recall: screening recall the operating threshold must reach on validation.
        require_recall: acceptance gate: pass only if the lower confidence bound of
            screening recall is at least this.
        confidence: two-sided confidence level of the intervals, in (0, 1).
        interval_method: 'wilson' or 'clopper-pearson' ('exact' is an alias).
        temperature_scaling: fit one temperature on validation and report the calibration
            before and after. Report only: predictions, threshold and export are unchanged.
        max_false_alarms: instead of a target recall, choose the operating threshold on
            validation as the lowest one whose false-alarm rate there is at most this.
        threshold_confidence: the confidence with which the threshold must keep
            ``target_recall`` given the number of validation cracks (see
            :func:`trainkit.judging.scoring.choose_threshold`).
    """

    split: str = "test"
    target_recall: float = 0.95
    require_recall: float | None = None
    confidence: float = 0.95
    interval_method: str = "wilson"
    temperature_scaling: bool = False
    max_false_alarms: float | None = None
    threshold_confidence: float = DEFAULT_PROMISE_CONFIDENCE

    def __post_init__(self) -> None:
        if self.split not in ("test", "val"):
            raise EvaluationError(f"expected split 'test' or 'val', got {self.split!r}")
        if not 0.0 < float(self.confidence) < 1.0:
            raise EvaluationError(f"expected confidence in (0, 1), got {self.confidence}")
        # validates the method and gives its canonical name
        object.__setattr__(
            self, "interval_method", M.recall_interval(0, 1, method=self.interval_method).method
        )
        if self.require_recall is not None and not 0.0 <= float(self.require_recall) <= 1.0:
            raise EvaluationError(f"expected require_recall in [0, 1], got {self.require_recall}")
        mfa = self.max_false_alarms
        if mfa is not None and not 0.0 <= float(mfa) < 1.0:
            raise EvaluationError(f"expected max_false_alarms in [0, 1), got {mfa}")
        if not 0.0 < float(self.threshold_confidence) < 1.0:
            raise EvaluationError(
                f"expected threshold_confidence in (0, 1), got {self.threshold_confidence}"
            )
        if self.max_false_alarms is None and not 0.0 < float(self.target_recall) < 1.0:
            raise EvaluationError(
                f"expected target_recall in (0, 1) (a recall of 1 cannot be promised from "
                f"a sample), got {self.target_recall}"
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
    test: Scored
    val: Scored
    threshold: float
    threshold_source: str
    stage1: tuple[np.ndarray, np.ndarray] | None = None  # first stage's screening (test, val)
    promise: dict | None = None  # the recall promise of the validation threshold

    def side(self) -> Side:
        return Side(str(self.exp), self.test, self.keys, self.threshold, self.threshold_source)


def _predict_logits(model, images: np.ndarray, num_classes: int, batch_size: int = 64):
    """Logits and softmax probabilities (float32), batched as in steps.predict_proba."""
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


def _scored(model, data: PatchSet, num_classes: int) -> Scored:
    logits, probs = _predict_logits(model, data.images, num_classes)
    return Scored(data.labels, probs, logits, list(data.photos), list(data.groups), data.patch_mm)


def _job_validation(model, ws, ckpt: dict, class_set) -> tuple[Scored | None, np.ndarray | None]:
    """An adapted model's job validation cells, scored, with their design weights."""
    adaptation = ckpt["experiment"].get("adaptation") or {}
    ids = adaptation.get("cells", {}).get("val")
    if not ids:
        return None, None
    data = load_patch_set(ws, "job-val", class_set, input_px=ckpt["input_px"], ids=set(ids))
    pi = {
        c["patch_id"]: c["inclusion_probability"]
        for job in adaptation.get("jobs", [])
        for c in ws.job_cells(job)
    }
    weights = np.array([1.0 / pi[int(i)] for i in data.patch_ids])
    return _scored(model, data, class_set.num_classes), weights


def _run_experiment(exp_dir: str | Path, opts: EvaluationOptions, workspace) -> _Run:
    from trainkit.learning.network import load_checkpoint

    folder = Experiment(Path(exp_dir).resolve())
    folder.migrate()
    exp = folder.path
    model, ckpt, class_set = load_checkpoint(exp)
    ws_path = Path(workspace) if workspace else Path(ckpt["experiment"]["workspace"])
    if not ws_path.is_dir():
        raise EvaluationError(
            f"workspace {ws_path} of experiment {exp} does not exist; pass --workspace"
        )
    ws = Workspace.open(ws_path)
    records = ws.patches(labelled=True)
    check_no_leak(records)
    data = load_patch_set(ws, opts.split, class_set, input_px=ckpt["input_px"])
    if len(data) == 0:
        raise EvaluationError(f"the {opts.split!r} subset of {ws.root} has no labelled patches")
    box_of = {r.id: r.box for r in records}
    keys = [(p, tuple(box_of[int(i)])) for p, i in zip(data.photos, data.patch_ids, strict=True)]
    # An adapted model's validation includes the job cells it validated on (never its test).
    val_data = load_subset(ws, "val", class_set, ckpt["experiment"], input_px=ckpt["input_px"])
    nc = class_set.num_classes
    test, val = _scored(model, data, nc), _scored(model, val_data, nc)
    # Operating threshold: chosen on validation, reported on the evaluated subset.
    threshold, source, promise = choose_threshold(
        val,
        target_recall=opts.target_recall,
        max_false_alarms=opts.max_false_alarms,
        confidence=opts.threshold_confidence,
    )
    job, weights = _job_validation(model, ws, ckpt, class_set)
    threshold, source = threshold_for_job_too(
        threshold, source, job, weights,
        target_recall=opts.target_recall, max_false_alarms=opts.max_false_alarms,
    )  # fmt: skip
    stage1 = None
    if ckpt.get("cascade") is not None:
        from trainkit.learning.cascade import load_stage1

        first = load_stage1(ckpt["cascade"])
        stage1 = tuple(_scored(first, d, 2).screening for d in (data, val_data))
    return _Run(exp, ckpt, class_set, ws, data, keys, test, val, threshold, source, stage1, promise)


def _promise_block(run: _Run) -> dict | None:
    """The recall promise of the operating threshold (None under a false-alarm budget).

    ``threshold`` is the validation rule's; the operating threshold may be lower (an
    adapted model's job cells asked for it), which flags more and keeps the promise.
    """
    if run.promise is None:
        return None
    return {**run.promise, "operating_threshold": run.threshold}


def _cascade_figures(run: _Run, opts: EvaluationOptions) -> dict | None:
    """The cascade's block of metrics.json (None without a first stage)."""
    if run.stage1 is None:
        return None
    s1_test, s1_val = run.stage1
    record = run.ckpt["cascade"]
    block = cascade_block(
        (s1_val, run.val.screening, run.val.is_crack),
        (s1_test, run.test.screening, run.test.is_crack),
        run.threshold,
        confidence=opts.confidence,
        method=opts.interval_method,
        # first stages written before the margin existed kept none
        spare_share=float(record["config"].get("spare_pass_share", 0.0)),
    )
    block.update(
        network=record["config"],
        loss=record.get("loss"),
        training_seconds=record.get("seconds"),
    )
    return block


def _evaluated_digest(keys, labels: np.ndarray, names: list[str]) -> str:
    h = hashlib.sha256()
    for (photo, box), y in sorted(zip(keys, labels.tolist(), strict=True)):
        h.update(f"{photo}|{box}|{names[y]}\n".encode())
    return h.hexdigest()


# --------------------------------------------------------------------------- entry point


def evaluate_experiment(
    exp_dir: str | Path,
    *,
    workspace: str | Path | None = None,
    against: str | Path | None = None,
    **options,
) -> dict:
    """Evaluate an experiment's checkpoint on one subset; write the evaluation folder.

    Args:
        exp_dir: experiment folder with ``checkpoint.pt`` and ``experiment.json``.
        workspace: workspace folder, if it moved since training.
        against: a second experiment to compare with on the same patches (its own
            threshold is chosen on validation by the same rule). It reads ``workspace``
            when given, else the workspace it was trained on.
        **options: the fields of :class:`EvaluationOptions`.

    Returns:
        The metrics dictionary that was written to metrics.json (keys: module docstring).

    Raises:
        EvaluationError: on bad options, an empty subset, or experiments that cannot be
            compared.
    """
    opts = EvaluationOptions(**options)
    run = _run_experiment(exp_dir, opts, workspace)
    try:
        result = score_predictions(
            run.test,
            run.val,
            class_names=list(run.class_set.names),
            threshold=run.threshold,
            threshold_source=run.threshold_source,
            split=opts.split,
            confidence=opts.confidence,
            method=opts.interval_method,
            target_recall=opts.target_recall,
            max_false_alarms=opts.max_false_alarms,
            require_recall=opts.require_recall,
            temperature_scaling=opts.temperature_scaling,
        )
        result["screening"]["promise"] = _promise_block(run)
        result["cascade"] = _cascade_figures(run, opts)
        comparison = arrays = None
        if against is not None:
            # The second experiment reads the same workspace when one was given (it moved).
            run_b = _run_experiment(against, opts, workspace)
            if list(run.class_set.names) != list(run_b.class_set.names):
                raise ComparisonError(
                    "cannot compare: the class sets differ "
                    f"({list(run.class_set.names)} in {run.exp} vs "
                    f"{list(run_b.class_set.names)} in {run_b.exp})"
                )
            comparison, arrays = paired_comparison(run.side(), run_b.side())
            comparison["disagreements_csv"] = Experiment.DISAGREEMENTS
    except (ComparisonError, ValueError) as exc:
        raise EvaluationError(str(exc)) from None
    result = _with_provenance(result, run, comparison)
    _write_evaluation(Experiment(run.exp), result, run, arrays)
    return result


def _with_provenance(result: dict, run: _Run, comparison: dict | None) -> dict:
    """Add the comparison and where the figures come from; JSON-ready (nan -> null)."""
    from trainkit import __version__

    ckpt = run.ckpt
    caution = result.pop("caution")
    result.update(
        comparison=comparison,
        experiment=str(run.exp),
        workspace=str(run.ws.root.resolve()),
        model={
            "checkpoint": str(Experiment(run.exp).checkpoint_path),
            "backbone": ckpt.get("config", {}).get("backbone"),
            "epoch": ckpt.get("best_epoch"),
            "weights": ckpt.get("weights"),
        },
        checkpoint_epoch=ckpt.get("best_epoch"),
        data_digest=ckpt["experiment"].get("data_digest"),
        evaluated_digest=_evaluated_digest(run.keys, run.test.labels, list(run.class_set.names)),
        kit_version=__version__,
        created=_dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        caution=caution,
    )
    return json_ready(result)


# --------------------------------------------------------------------------- writing


def _write_evaluation(folder: Experiment, result: dict, run: _Run, arrays: dict | None) -> None:
    """predictions.csv, metrics.json, the report and (with a comparison) disagreements.csv."""
    from trainkit.judging.report import write_report

    out = folder.evaluation_dir
    out.mkdir(parents=True, exist_ok=True)
    data, names = run.data, list(run.class_set.names)
    _write_predictions(folder.predictions_path, data, run.test.probs, run.class_set)
    if arrays is not None:
        write_disagreements(
            out / Experiment.DISAGREEMENTS, arrays, patch_ids=data.patch_ids,
            photos=data.photos, groups=data.groups, labels=data.labels, class_names=names,
        )  # fmt: skip
    atomic_write_json(folder.metrics_path, result)
    write_report(
        out,
        result,
        data=data,
        probs=run.test.probs,
        class_set=run.class_set,
        experiment=run.ckpt["experiment"],
        comparison_images=None if arrays is None else data.images[arrays["index"]],
        comparison_rows=None if arrays is None else _comparison_rows(arrays, data),
    )
    if arrays is None:
        (out / Experiment.DISAGREEMENTS).unlink(missing_ok=True)
        (out / "disagreements.png").unlink(missing_ok=True)


def _write_predictions(path: Path, data: PatchSet, probs: np.ndarray, class_set: ClassSet) -> None:
    # float32 probabilities with 9 significant digits and the float64 screening
    # probability in round-trip form, so thresholds recompute exactly.
    names = class_set.names
    pred = probs.argmax(1)
    scr = Scored(data.labels, probs, probs).screening
    with atomic_path(path) as tmp, tmp.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(
            ["patch_id", "photo", "group", "true", "predicted"]
            + [f"p_{n}" for n in names]
            + ["screening_probability"]
        )
        for i in range(len(data)):
            w.writerow(
                [
                    int(data.patch_ids[i]), csv_cell(data.photos[i]), csv_cell(data.groups[i]),
                    csv_cell(names[data.labels[i]]), csv_cell(names[pred[i]]),
                    *[f"{p:.9g}" for p in probs[i]], repr(float(scr[i])),
                ]
            )  # fmt: skip


def _comparison_rows(arrays: dict, data: PatchSet) -> list[dict]:
    return [
        {
            "patch_id": int(data.patch_ids[i]),
            "crack": bool(data.labels[i] != 0),
            "pa": float(arrays["pa"][i]),
            "pb": float(arrays["pb"][i]),
            "fa": bool(arrays["fa"][i]),
            "fb": bool(arrays["fb"][i]),
        }
        for i in arrays["index"]
    ]
