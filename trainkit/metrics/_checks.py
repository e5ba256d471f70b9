"""Input validation shared by the metric functions (messages that name the input).

Two kinds of failure: a malformed argument (wrong shape, dtype, range) is the calling
code's mistake and raises ``ValueError``/``TypeError``; data a user supplied that no
figure can be computed from (no crack patch, no non-crack patch, nothing at all) raises
:class:`MetricsError`, a :class:`~trainkit.core.errors.TrainkitError` the command line
shows as one line. Callers with an error class of their own (the job design) pass it as
``error``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from trainkit.core.errors import TrainkitError


class MetricsError(TrainkitError):
    """The data hold nothing a figure can be computed from (e.g. no crack patch at all)."""


#: Canonical interval method names; "exact" is accepted as an alias of "clopper-pearson".
INTERVAL_METHODS: tuple[str, ...] = ("wilson", "clopper-pearson")
_METHOD_ALIASES = {
    "wilson": "wilson",
    "clopper-pearson": "clopper-pearson",
    "exact": "clopper-pearson",
}
_METHOD_DISPLAY = {"wilson": "Wilson", "clopper-pearson": "Clopper-Pearson"}


def _as_1d(x: ArrayLike, name: str, *, error: type[Exception] = ValueError) -> np.ndarray:
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise error(f"expected {name} to be 1-D of shape (n,), got shape {arr.shape}")
    return arr


def _same_length(a: np.ndarray, b: np.ndarray, name_a: str, name_b: str) -> None:
    if a.shape[0] != b.shape[0]:
        raise ValueError(
            f"expected {name_a} and {name_b} to have the same length, "
            f"got {a.shape[0]} and {b.shape[0]}"
        )


def _as_bool(x: ArrayLike, name: str) -> np.ndarray:
    """A 1-D bool array from bool or 0/1 values."""
    arr = _as_1d(x, name)
    if arr.dtype == bool:
        return arr
    if arr.size == 0:
        return arr.astype(bool)
    if not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise TypeError(f"expected {name} to hold bool or 0/1 values, got dtype {arr.dtype}")
    bad = ~np.isin(arr, (0, 1))
    if bad.any():
        raise ValueError(
            f"expected {name} to hold bool or 0/1 values, got {arr[bad][:5].tolist()} "
            f"({int(bad.sum())} bad values)"
        )
    return arr.astype(bool)


def _as_unit_float(
    x: ArrayLike,
    name: str,
    *,
    error: type[Exception] = ValueError,
    type_error: type[Exception] = TypeError,
) -> np.ndarray:
    """A 1-D float array with finite values in [0, 1]."""
    arr = _as_1d(x, name, error=error)
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise type_error(f"expected {name} to be numbers in [0, 1], got dtype {arr.dtype}")
    arr = arr.astype(float)
    bad = ~np.isfinite(arr) | (arr < 0.0) | (arr > 1.0)
    if bad.any():
        raise error(
            f"expected {name} to be finite values in [0, 1], got {arr[bad][:5].tolist()} "
            f"({int(bad.sum())} bad values)"
        )
    return arr


def _check_labels(labels: Sequence[Any] | None) -> np.ndarray:
    if labels is None:
        raise TypeError("labels is required (a sequence of all class labels), got None")
    arr = np.asarray(labels)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError(f"expected labels to be a non-empty 1-D sequence, got shape {arr.shape}")
    if np.unique(arr).size != arr.size:
        raise ValueError(f"expected labels without repeats, got {arr.tolist()}")
    return arr


def _check_in_labels(values: np.ndarray, labels: np.ndarray, name: str) -> None:
    unknown = ~np.isin(values, labels)
    if unknown.any():
        raise ValueError(
            f"expected every value of {name} to be one of labels {labels.tolist()}, "
            f"got {np.unique(values[unknown])[:10].tolist()}"
        )


_UNIT_INTERVALS = {
    "[0, 1]": (False, False),
    "(0, 1]": (True, False),
    "[0, 1)": (False, True),
    "(0, 1)": (True, True),
}


def _unit_number(
    value: float,
    name: str,
    interval: str,
    *,
    error: type[Exception] = ValueError,
    type_error: type[Exception] = TypeError,
) -> float:
    """One number within ``interval`` (``"[0, 1]"``, ``"(0, 1]"``, ``"[0, 1)"``, ``"(0, 1)"``)."""
    open_low, open_high = _UNIT_INTERVALS[interval]
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise type_error(
            f"expected {name} to be a number in {interval}, got {type(value).__name__} {value!r}"
        )
    v = float(value)
    low_ok = v > 0.0 if open_low else v >= 0.0
    high_ok = v < 1.0 if open_high else v <= 1.0
    if not (math.isfinite(v) and low_ok and high_ok):
        raise error(f"expected {name} in {interval}, got {value}")
    return v


def _check_confidence(confidence: float) -> float:
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float, np.floating)):
        raise TypeError(
            f"expected confidence to be a float in (0, 1), got {type(confidence).__name__}"
        )
    if not 0.0 < float(confidence) < 1.0:
        raise ValueError(f"expected confidence in (0, 1), got {confidence}")
    return float(confidence)


def _check_n_bins(n_bins: int) -> int:
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)):
        raise TypeError(f"expected n_bins to be a positive int, got {type(n_bins).__name__}")
    if n_bins < 1:
        raise ValueError(f"expected n_bins >= 1, got {n_bins}")
    return int(n_bins)


def _ratio(num: int, den: int) -> float:
    return num / den if den > 0 else math.nan
