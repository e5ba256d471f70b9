"""Typed records of the files the model card reads: the checkpoint, ``experiment.json``,
``evaluation/metrics.json``, ``export.json`` and ``jobs.json``.

They are :class:`~typing.TypedDict` shapes of the JSON (and checkpoint) dictionaries as the
kit writes them, so the readers keep the files' own keys and nothing is converted. Keys a
file may lack (older experiment folders, a model never evaluated or never exported, a run
without a cascade) are optional and are read with ``.get``. :func:`read_card_inputs`
gathers what a card of one experiment folder needs; ``make typecheck`` checks every read of
the model card against these shapes.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, NotRequired, TypedDict, cast

from trainkit.core.experiment import Experiment

__all__ = [
    "AdaptationRecord",
    "CardInputs",
    "CascadeRecord",
    "CheckpointRecord",
    "ExportRecord",
    "GateRecord",
    "IntervalRecord",
    "JobRecord",
    "MetricsRecord",
    "PerClassRecord",
    "RatesRecord",
    "ProvenanceRecord",
    "RecipeRecord",
    "ScreeningRecord",
    "SplitRecord",
    "WeightsRecord",
    "read_card_inputs",
]


# ----- the checkpoint and experiment.json ------------------------------------------------


class WeightsRecord(TypedDict, total=False):
    """Which weights training started from (``weights_provenance``)."""

    name: str
    source: str
    sha256: str


class RecipeRecord(TypedDict, total=False):
    """The parts of the resolved recipe (the checkpoint's ``config``) that the card shows."""

    backbone: str
    class_set: str
    epochs: int
    batch_size: int
    lr: float
    seed: int
    false_alarm_budget: float
    head_epochs: int
    cached_features: bool
    weights: str | None


class SplitRecord(TypedDict, total=False):
    """The split summary recorded at training: patches per subset and class, groups."""

    class_counts: dict[str, dict[str, int]]
    groups: dict[str, int]
    patches: dict[str, int]
    test_fraction: float
    val_fraction: float
    seed: int


class AdaptationRecord(TypedDict):
    """What an adapted model (``trainkit train --from``) learned from a job."""

    source: str
    jobs: NotRequired[list[str]]
    cells: NotRequired[dict[str, list[Any]]]
    frames: NotRequired[list[Any]]
    replay: NotRequired[int]


class ProvenanceRecord(TypedDict, total=False):
    """``experiment.json`` (also kept in the checkpoint as ``experiment``)."""

    workspace: str
    split: SplitRecord
    class_set: dict[str, Any]
    input_px: int
    gsd_mm_range: list[float] | None
    patch_mm_range: list[float] | None
    data_digest: str
    adaptation: AdaptationRecord | None


class CheckpointRecord(TypedDict, total=False):
    """The checkpoint dictionary (``checkpoint.pt``) as far as the card reads it."""

    config: RecipeRecord
    experiment: ProvenanceRecord
    input_px: int
    best_epoch: int
    best_val: dict[str, float | None]
    selected_on: str
    weights: WeightsRecord
    cascade: dict[str, Any]


# ----- evaluation/metrics.json ---------------------------------------------------------


class IntervalRecord(TypedDict, total=False):
    """A recall interval: ``k`` found of ``n``, its bounds, method and confidence."""

    low: float | None
    high: float | None
    confidence: float
    method: str
    k: int
    n: int


class CountsRecord(TypedDict, total=False):
    """Confusion counts of the screening decision (on validation, or at 0.5)."""

    tp: int
    fp: int
    tn: int
    fn: int
    recall: float | None


class RatesRecord(TypedDict, total=False):
    """Recall and false-alarm rate of one way of screening (the cascade, the main network)."""

    recall: float | None
    false_alarm_rate: float | None


class PromiseRecord(TypedDict, total=False):
    """The recall promise of a threshold chosen for a target recall (metrics.RecallPromise)."""

    threshold: float
    target: float
    confidence: float
    cracks: int
    below: int
    achieved_confidence: float
    recall_bound: float
    validation_recall: float
    kept: bool
    cracks_needed: int
    effective_cracks: float
    photo_correlation: float
    operating_threshold: float


class ScreeningRecord(TypedDict, total=False):
    """The headline: crack against no crack at the chosen threshold."""

    recall: float | None
    recall_interval: IntervalRecord
    false_alarm_rate: float | None
    tp: int
    fp: int
    tn: int
    fn: int
    threshold: float
    threshold_source: str
    threshold_independent: bool
    promise: PromiseRecord | None
    validation: CountsRecord | None
    at_default_threshold: CountsRecord


class PerClassRecord(TypedDict):
    """One class's recall and interval."""

    name: str
    recall: NotRequired[float | None]
    support: NotRequired[int]
    recall_interval: NotRequired[IntervalRecord]
    recall_ci_low: NotRequired[float | None]
    recall_ci_high: NotRequired[float | None]


class GateRecord(TypedDict, total=False):
    """The acceptance gate: the required lower bound of screening recall and the verdict."""

    required_recall: float
    passed: bool
    verdict: str


class CascadeRecord(TypedDict):
    """The cascade section: the first stage's figures beside the main network's."""

    gate: GateRecord
    pass_threshold: NotRequired[float | None]
    threshold_source: NotRequired[str]
    network: NotRequired[dict[str, Any]]
    loss: NotRequired[str]
    cascade: NotRequired[RatesRecord]
    main: NotRequired[RatesRecord]
    passed_share: NotRequired[float]


class MetricsRecord(TypedDict):
    """``evaluation/metrics.json``: the screening headline is always there."""

    screening: ScreeningRecord
    split: NotRequired[str]
    patches: NotRequired[int]
    photos: NotRequired[int]
    accuracy: NotRequired[float | None]
    interval_method: NotRequired[str]
    confidence: NotRequired[float]
    per_class: NotRequired[list[PerClassRecord]]
    gate: NotRequired[GateRecord | None]
    cascade: NotRequired[CascadeRecord | None]
    familiarity: NotRequired[dict[str, Any] | None]
    caution: NotRequired[str]
    data_digest: NotRequired[str]


# ----- export.json and jobs.json -------------------------------------------------------


class ExportRecord(TypedDict, total=False):
    """The export summary (``export.json``, and what ``export_experiment`` returns)."""

    model: str
    opset: int
    bytes: int
    parity_max_abs_diff: float
    parity_patches: int
    familiarity_max_rel_diff: float | None
    familiarity: dict[str, Any] | None
    familiarity_skipped: str | None
    cascade: dict[str, Any] | None
    cascade_skipped: str | None
    contract: str
    batchnorm_nodes: int
    exporter: str
    threshold: float
    weights: WeightsRecord
    evaluated: bool
    model_card: str


class EstimateRecord(TypedDict):
    """A job's estimate with its interval."""

    estimate: float | None
    low: float | None
    high: float | None


class JobRecord(TypedDict):
    """One check of the model on a job (a line of ``jobs.json``)."""

    job: str
    checked: str
    cells_answered: int
    recall: EstimateRecord
    false_alarm_rate: EstimateRecord
    gate: NotRequired[GateRecord | None]
    required_recall: NotRequired[float | None]
    verdict: NotRequired[str | None]
    model_sha256: NotRequired[str | None]


# ----- one reader ------------------------------------------------------------------------


@dataclass(frozen=True)
class CardInputs:
    """What the model card of one experiment folder is made from."""

    #: ``experiment.json``, else the checkpoint's copy, else empty.
    experiment: ProvenanceRecord
    #: None when the experiment was not evaluated.
    metrics: MetricsRecord | None
    #: The job checks, oldest first (empty when none).
    jobs: list[JobRecord]


def read_card_inputs(exp_dir: str | Path, ckpt: CheckpointRecord) -> CardInputs:
    """Read the files of ``exp_dir`` that the card needs besides the checkpoint and the export.

    Raises:
        ExperimentFileError: one of the files is damaged.
    """
    folder = Experiment(exp_dir)
    provenance = folder.read_provenance() or ckpt.get("experiment") or {}
    return CardInputs(
        experiment=cast(ProvenanceRecord, provenance),
        metrics=cast("MetricsRecord | None", folder.read_metrics()),
        jobs=cast("list[JobRecord]", folder.read_jobs()),
    )
