"""The ONNX screener contract: its version, input and output names, metadata keys, and their encoding.

One module, used by export (writing) and by the Screener (reading), so the two can
never drift apart. Metadata values are strings in the ONNX file; structured values
are JSON. A change to anything here that an older reader cannot ignore bumps
:data:`CONTRACT_VERSION`; readers keep accepting every version in
:data:`READABLE_VERSIONS`.

Versions:

- ``trainkit-screener-1``: one output, ``probabilities``.
- ``trainkit-screener-2`` (migration note: readers of version 1 that check for exactly one
  output must accept a second one): a second output ``familiarity``, float32 (N,), the
  patch's smallest Mahalanobis distance to a training class in the model's feature space
  (:mod:`trainkit.core.familiarity`), and the metadata key ``familiarity`` (JSON:
  ``threshold``, ``rule``, how it was fitted). A frame whose cells' median familiarity
  exceeds the threshold looks unlike the training data. Version-1 models still load; they
  give no familiarity and so no unfamiliar-surface warning.

  Migration note (kit 2 Dec 2026, same version: the rule an older reader applies is
  unchanged and still right): the ``familiarity`` output of models exported from then on
  is the feature ensemble of :mod:`trainkit.core.familiarity`, the mean over the network's
  stage ends and penultimate layer of each layer's distance divided by its median on the
  training patches (about 1 for a familiar patch; earlier models gave the penultimate
  distance alone, in the tens), and ``familiarity.threshold`` is calibrated on frames (a
  split-conformal quantile of the validation photos' medians) instead of being the 99th
  percentile of validation patches. New informative keys: ``score``, ``threshold_rule``,
  ``alpha``, ``false_warning_bound``, ``calibration_frames``, ``layers``. Compare
  familiarity values only between cells of models exported the same way.
- ``trainkit-screener-3`` (migration note: written only for a two-stage cascade; models
  without one stay version 2, so version-2 readers keep reading them; a reader of version 2
  that checks for exactly two outputs must accept a third one): a third output ``reached``,
  bool (N,), true where the cell was passed by the cheap first stage and so scored by the
  main network; cells not passed carry the fixed clean vector (P(none) = 1) in
  ``probabilities``, and their ``familiarity`` comes from the first stage (every cell has
  one). The metadata key ``cascade`` (JSON) says how: ``pass_threshold`` on the first
  stage's ``1 - P(none)``, its network, and the validation figures that chose it.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, NoReturn

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.core.jsonsafe import dumps

__all__ = [
    "CONTRACT_VERSION",
    "READABLE_VERSIONS",
    "FORMAT_KEY",
    "INPUT_NAME",
    "OUTPUT_NAME",
    "FAMILIARITY_NAME",
    "FAMILIARITY_SINCE",
    "CASCADE_VERSION",
    "REACHED_NAME",
    "REQUIRED_KEYS",
    "PATCH_PX_RANGE",
    "ContractError",
    "contract_number",
    "ModelInfo",
    "encode_metadata",
    "decode_metadata",
    "screening_probability",
]

#: Metadata key holding the contract version.
FORMAT_KEY = "trainkit.format"
#: The version this kit writes for a single-stage model.
CONTRACT_VERSION = "trainkit-screener-2"
#: The version this kit writes for a two-stage cascade (the ``reached`` output).
CASCADE_VERSION = "trainkit-screener-3"
#: Versions this kit reads.
READABLE_VERSIONS = ("trainkit-screener-1", "trainkit-screener-2", "trainkit-screener-3")
#: The first version whose models carry the ``familiarity`` output.
FAMILIARITY_SINCE = "trainkit-screener-2"
#: The graph's one input: uint8 (N, S, S, 3) RGB, N dynamic.
INPUT_NAME = "image"
#: The graph's output: float32 (N, C) softmax over the class set.
OUTPUT_NAME = "probabilities"
#: The graph's second output from version 2: float32 (N,), larger is less familiar.
FAMILIARITY_NAME = "familiarity"
#: The third output from version 3: bool (N,), true where the main network scored the cell.
REACHED_NAME = "reached"
#: Keys every readable model carries.
REQUIRED_KEYS = (FORMAT_KEY, "class_names", "patch_px", "threshold")

_INPUT_TEXT = "image: uint8 (N, S, S, 3) RGB, S = patch_px; resize is the caller's job"
_OUTPUT_TEXT = "probabilities: float32 (N, C) softmax; screening probability = 1 - p[none]"


class ContractError(TrainkitError):
    """Metadata that does not follow the contract; the message says which key and why."""


def screening_probability(probabilities: np.ndarray) -> np.ndarray:
    """The screening probability of each patch: ``1 - P(none)``, clipped to [0, 1].

    Class 0 is always the no-crack class (a fixed contract), so this holds for every
    class set. Works on any array whose last axis is the class axis; keeps its dtype.
    """
    p = np.asarray(probabilities)
    return np.clip(1.0 - p[..., 0], 0.0, 1.0)


@dataclass(frozen=True)
class ModelInfo:
    """What the metadata of an exported screener says, as Python values.

    Attributes:
        class_names: class names in index order; ``class_names[0] == "none"``.
        patch_px: the model's input size S in pixels.
        threshold: screening threshold on ``1 - P(none)``.
        angle_centres: angle centre per class in degrees (None where a class has none).
        patch_mm: surface covered by one patch in mm, when the training data had a scale.
        threshold_source: how the threshold was chosen, in words.
        gsd_mm_range: (low, high) mm per pixel seen in training, when known.
        patch_mm_range: (low, high) patch coverage in mm seen in training, when known.
        kit_version: the kit version that exported the model.
        data_digest: digest of the training data.
        test_metrics: headline test figures, when the model was evaluated.
        weights: which weights training started from (name, source, SHA-256 prefix), or
            ``{"name": "random initialisation"}``.
        preprocess: the normalisation inside the graph (mean and std per RGB channel).
        familiarity: from version 2: ``threshold`` (cells' median above it: unfamiliar),
            ``rule`` and how it was fitted (``alpha`` and ``false_warning_bound`` of the
            frame threshold, ``layers``); None for version-1 models.
        cascade: version 3 only: ``pass_threshold`` (first stage's ``1 - P(none)`` at or above
            it: the main network runs), the first stage's network and how the threshold was
            chosen; None for single-stage models.
        version: the contract version.
        extra: any further keys, as stored (strings).
    """

    class_names: list[str]
    patch_px: int
    threshold: float
    angle_centres: list[float | None] = field(default_factory=list)
    patch_mm: float | None = None
    threshold_source: str = ""
    gsd_mm_range: tuple[float, float] | None = None
    patch_mm_range: tuple[float, float] | None = None
    kit_version: str = ""
    data_digest: str = ""
    test_metrics: dict | None = None
    weights: dict | None = None
    preprocess: dict | None = None
    familiarity: dict | None = None
    cascade: dict | None = None
    version: str = CONTRACT_VERSION
    extra: dict[str, str] = field(default_factory=dict)


_KNOWN = (
    FORMAT_KEY,
    "class_names",
    "angle_centres",
    "patch_px",
    "patch_mm",
    "threshold",
    "threshold_source",
    "gsd_mm_range",
    "patch_mm_range",
    "kit_version",
    "data_digest",
    "test_metrics",
    "weights",
    "preprocess",
    "familiarity",
    "cascade",
    "input",
    "output",
)


def contract_number(version: str) -> int:
    """The number of a contract version (``trainkit-screener-2`` -> 2)."""
    try:
        return int(version.rsplit("-", 1)[1])
    except (IndexError, ValueError):
        raise ContractError(f"malformed contract version {version!r}") from None


#: Patch sizes in pixels a model may declare (the training recipes' ``input_px`` range):
#: below it a frame's cells run into the hundreds of thousands, above it one patch batch
#: takes gigabytes.
PATCH_PX_RANGE = (16, 1024)


def encode_metadata(info: ModelInfo) -> dict[str, str]:
    """The metadata_props (string -> string) that describe ``info`` under the contract.

    Raises:
        ContractError: a field out of its range (the same checks as
            :func:`decode_metadata`: a model the Screener would refuse is never written).
    """
    if not info.class_names or info.class_names[0] != "none":
        raise ContractError(f"class 0 must be 'none', got {info.class_names[:1]}")
    meta = {
        FORMAT_KEY: info.version,
        "class_names": dumps(list(info.class_names)),
        "angle_centres": dumps(list(info.angle_centres)),
        "patch_px": str(int(info.patch_px)),
        "patch_mm": dumps(info.patch_mm),
        "threshold": json.dumps(float(info.threshold)),  # NaN stays NaN: refused below
        "threshold_source": info.threshold_source,
        "gsd_mm_range": dumps(_pair(info.gsd_mm_range)),
        "patch_mm_range": dumps(_pair(info.patch_mm_range)),
        "kit_version": info.kit_version,
        "data_digest": str(info.data_digest),
        "test_metrics": dumps(info.test_metrics),
        "weights": dumps(info.weights),
        "preprocess": dumps(info.preprocess),
        "input": _INPUT_TEXT,
        "output": _OUTPUT_TEXT,
    }
    if contract_number(info.version) >= contract_number(FAMILIARITY_SINCE):
        if not info.familiarity or "threshold" not in info.familiarity:
            raise ContractError(f"contract {info.version} needs familiarity with a threshold")
        meta["familiarity"] = json.dumps(info.familiarity)  # a NaN threshold is refused below
    if (info.version == CASCADE_VERSION) != bool(info.cascade):
        raise ContractError(f"contract {info.version} and cascade {info.cascade!r} do not match")
    if info.cascade:
        _check_cascade(info.cascade, "model")
        meta["cascade"] = dumps(info.cascade)
    meta.update(info.extra)
    decode_metadata(meta, "the model being exported")  # every range check, before writing
    return meta


def decode_metadata(meta: Mapping[str, str], name: str = "model") -> ModelInfo:
    """Read metadata_props back into a :class:`ModelInfo`, each field checked against its meaning.

    Ranges: ``threshold`` a number with 0 < t < 1 (0 or less flags every cell, 1 or more
    none); ``patch_px`` a whole number in :data:`PATCH_PX_RANGE`; ``patch_mm`` null or a
    finite number above 0; ``class_names`` at least two distinct non-empty names, the first
    ``none``; ``angle_centres`` one per class, each null or in [0, 180) degrees;
    ``gsd_mm_range`` and ``patch_mm_range`` null or [low, high] with 0 < low <= high, finite;
    ``familiarity.threshold`` (contract 2 on) a finite number above 0 (a NaN or infinite
    one would switch the unfamiliar-surface warning off); ``cascade.pass_threshold``
    (contract 3) in [0, 1]. Every earlier contract version is read by the same rules.

    Args:
        meta: the model's metadata_props as a dict of strings.
        name: the model's file name, used in error messages.

    Raises:
        ContractError: a required key is missing, the version is unknown, or a value is
            malformed or out of its range (one line: the field, the value, the valid range).
    """
    missing = [k for k in REQUIRED_KEYS if k not in meta]
    if missing:
        raise ContractError(
            f"{name} lacks trainkit metadata {missing}: not a model made by `trainkit export`"
        )
    version = meta[FORMAT_KEY]
    if version not in READABLE_VERSIONS:
        raise ContractError(
            f"{name} uses contract {version!r}; this kit reads "
            f"{', '.join(READABLE_VERSIONS)} (update trainkit)"
        )
    field_ = _FieldReader(meta, name)
    class_names = field_.class_names()
    info = ModelInfo(
        class_names=class_names,
        patch_px=field_.patch_px(),
        threshold=field_.threshold(),
        angle_centres=field_.angle_centres(len(class_names)),
        patch_mm=field_.patch_mm(),
        threshold_source=meta.get("threshold_source", ""),
        gsd_mm_range=field_.pair("gsd_mm_range", "mm per pixel seen in training"),
        patch_mm_range=field_.pair("patch_mm_range", "patch coverage in mm seen in training"),
        kit_version=meta.get("kit_version", ""),
        data_digest=meta.get("data_digest", ""),
        test_metrics=field_.json("test_metrics"),
        weights=field_.json("weights"),
        preprocess=field_.json("preprocess"),
        familiarity=field_.json("familiarity"),
        cascade=field_.json("cascade"),
        version=version,
        extra={k: v for k, v in meta.items() if k not in _KNOWN},
    )
    if contract_number(version) >= contract_number(FAMILIARITY_SINCE):
        fam = info.familiarity
        if not (isinstance(fam, dict) and _is_number(fam.get("threshold"))):
            raise ContractError(f"{name}: contract {version} needs metadata familiarity.threshold")
        t = float(fam["threshold"])
        if not (math.isfinite(t) and t > 0):
            field_.refuse(
                "familiarity.threshold",
                _show(fam["threshold"]),
                "a finite number above 0 (a frame whose cells' median familiarity is above it "
                "is unfamiliar; NaN or infinity would switch that warning off)",
            )
    if version == CASCADE_VERSION:
        _check_cascade(info.cascade, name)
    return info


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _show(v: Any) -> str:
    """A value as JSON text (NaN and Infinity as JSON readers that allow them spell them)."""
    try:
        text = json.dumps(v)
    except (TypeError, ValueError):
        text = repr(v)
    return text if len(text) <= 80 else text[:77] + "..."


class _FieldReader:
    """Reads one metadata field at a time; a bad one is refused naming field, value and range."""

    def __init__(self, meta: Mapping[str, str], name: str) -> None:
        self.meta = meta
        self.name = name

    def refuse(self, key: str, shown: str, rule: str) -> NoReturn:
        raise ContractError(f"{self.name}: metadata {key} is {shown}; it must be {rule}")

    def raw(self, key: str) -> str:
        text = " ".join(str(self.meta[key]).split())  # one line whatever the file holds
        return text if len(text) <= 80 else text[:77] + "..."

    def json(self, key: str, default: str = "null") -> Any:
        try:
            return json.loads(self.meta.get(key, default))
        except (ValueError, TypeError) as exc:
            self.refuse(key, self.raw(key), f"JSON text ({exc})")

    def number(self, key: str, rule: str) -> float | None:
        """The field as a float (None for null); text that is not a number is refused."""
        v = self.json(key)
        if v is None:
            return None
        if isinstance(v, str):  # tolerated: a number written as JSON text
            try:
                v = float(v)
            except ValueError:
                self.refuse(key, self.raw(key), rule)
        if not _is_number(v):
            self.refuse(key, self.raw(key), rule)
        return float(v)

    def threshold(self) -> float:
        rule = (
            "a number with 0 < threshold < 1 (a cell is flagged when 1 - P(none) >= threshold: "
            "0 or less flags every cell, 1 or more none)"
        )
        t = self.number("threshold", rule)
        if t is None or not 0.0 < t < 1.0:  # NaN fails this too
            self.refuse("threshold", self.raw("threshold"), rule)
        return t

    def patch_px(self) -> int:
        lo, hi = PATCH_PX_RANGE
        rule = f"a whole number from {lo} to {hi} (the model's input size in pixels)"
        try:
            px = int(str(self.meta["patch_px"]).strip())
        except ValueError:
            self.refuse("patch_px", self.raw("patch_px"), rule)
        if not lo <= px <= hi:
            self.refuse("patch_px", self.raw("patch_px"), rule)
        return px

    def patch_mm(self) -> float | None:
        rule = "null or a finite number above 0 (mm of surface one patch covers)"
        v = self.number("patch_mm", rule)
        if v is not None and not (math.isfinite(v) and v > 0):
            self.refuse("patch_mm", self.raw("patch_mm"), rule)
        return v

    def class_names(self) -> list[str]:
        rule = "a list of at least 2 distinct class names, class 0 'none'"
        names = self.json("class_names")
        if not isinstance(names, list) or len(names) < 2:
            self.refuse("class_names", self.raw("class_names"), rule)
        if not all(isinstance(c, str) for c in names):
            self.refuse("class_names", self.raw("class_names"), rule + "; names are text")
        if any(not c.strip() for c in names):
            self.refuse("class_names", self.raw("class_names"), rule + "; it has an empty name")
        seen: set[str] = set()
        for c in names:
            if c in seen:
                self.refuse("class_names", self.raw("class_names"), f"{rule}; it repeats {c!r}")
            seen.add(c)
        if names[0] != "none":
            raise ContractError(f"{self.name}: class 0 must be 'none', got {names[:1]}")
        return names

    def angle_centres(self, n: int) -> list[float | None]:
        rule = f"a list of {n} angles, one per class, each null or in [0, 180) degrees"
        centres = self.json("angle_centres")
        if centres is None or centres == []:  # older models may omit them
            return [None] * n
        if not isinstance(centres, list) or len(centres) != n:
            self.refuse("angle_centres", self.raw("angle_centres"), rule)
        for c in centres:
            if c is not None and not (_is_number(c) and 0.0 <= c < 180.0):  # NaN fails too
                self.refuse("angle_centres", self.raw("angle_centres"), rule)
        return [None if c is None else float(c) for c in centres]

    def pair(self, key: str, meaning: str) -> tuple[float, float] | None:
        rule = f"null or [low, high] with 0 < low <= high, both finite ({meaning})"
        v = self.json(key)
        if not v:
            return None
        if not (isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v)):
            self.refuse(key, self.raw(key), rule)
        lo, hi = float(v[0]), float(v[1])
        if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
            self.refuse(key, self.raw(key), rule)
        return lo, hi


def _check_cascade(cascade: Any, name: str) -> None:
    if not (
        isinstance(cascade, dict)
        and _is_number(cascade.get("pass_threshold"))
        and 0.0 <= cascade["pass_threshold"] <= 1.0
    ):
        raise ContractError(
            f"{name}: contract {CASCADE_VERSION} needs metadata cascade.pass_threshold in [0, 1], "
            f"got {_show(cascade)}"
        )


def _pair(v: Any) -> list[float] | None:
    return None if not v else [float(v[0]), float(v[1])]
