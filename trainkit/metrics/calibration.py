"""Calibration: reliability bins, expected calibration error, softmax, NLL and temperature scaling."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from trainkit.metrics._checks import (
    MetricsError,
    _as_1d,
    _as_bool,
    _as_unit_float,
    _check_n_bins,
    _same_length,
)


def _bin_stats(
    confidences: ArrayLike, correct: ArrayLike, n_bins: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    conf = _as_unit_float(confidences, "confidences")
    corr = _as_bool(correct, "correct")
    _same_length(conf, corr, "confidences", "correct")
    nb = _check_n_bins(n_bins)
    if conf.size == 0:
        raise MetricsError("expected at least one sample, got 0")
    # Edges i / n_bins (correctly rounded), bins (lo, hi], the first bin also holds 0.
    edges = np.arange(nb + 1) / nb
    idx = np.clip(np.searchsorted(edges, conf, side="left") - 1, 0, nb - 1)
    count = np.bincount(idx, minlength=nb)
    conf_sum = np.bincount(idx, weights=conf, minlength=nb)
    corr_sum = np.bincount(idx, weights=corr.astype(float), minlength=nb)
    return edges, count, conf_sum, corr_sum, conf


def reliability_bins(
    confidences: ArrayLike, correct: ArrayLike, *, n_bins: int = 10
) -> list[dict[str, Any]]:
    """Equal-width reliability-diagram bins over [0, 1].

    Bins are ``(lo, hi]`` with edges ``i / n_bins``; the first bin is ``[0, hi]``.

    Args:
        confidences: confidence of each prediction in [0, 1], shape (n,).
        correct: whether each prediction was right (bool or 0/1), shape (n,).
        n_bins: number of bins.

    Returns:
        One dict per bin (empty bins included) with lo, hi, count, accuracy and
        confidence (mean within the bin; nan for an empty bin).

    Raises:
        ValueError: on empty input, mismatched lengths or confidences outside [0, 1].
    """
    edges, count, conf_sum, corr_sum, _ = _bin_stats(confidences, correct, n_bins)
    out = []
    for i in range(count.size):
        c = int(count[i])
        out.append(
            {
                "lo": float(edges[i]),
                "hi": float(edges[i + 1]),
                "count": c,
                "accuracy": float(corr_sum[i] / c) if c else math.nan,
                "confidence": float(conf_sum[i] / c) if c else math.nan,
            }
        )
    return out


def expected_calibration_error(
    confidences: ArrayLike, correct: ArrayLike, *, n_bins: int = 10
) -> float:
    """Expected calibration error with equal-width bins (Guo et al. 2017).

    ``ECE = sum_m |B_m| / n * |acc(B_m) - conf(B_m)|`` over the bins of
    :func:`reliability_bins`; empty bins contribute nothing.

    Args:
        confidences: confidence of each prediction in [0, 1], shape (n,).
        correct: whether each prediction was right (bool or 0/1), shape (n,).
        n_bins: number of bins.

    Returns:
        The ECE, in [0, 1].

    Raises:
        ValueError: on empty input, mismatched lengths or confidences outside [0, 1].
    """
    _, count, conf_sum, corr_sum, conf = _bin_stats(confidences, correct, n_bins)
    # |B_m|/n * |acc - conf| = |sum(correct) - sum(conf)| / n per bin.
    return float(np.abs(corr_sum - conf_sum).sum() / conf.size)


def _check_logits(logits: ArrayLike, labels: ArrayLike | None = None) -> tuple[np.ndarray, Any]:
    z = np.asarray(logits, dtype=float)
    if z.ndim != 2 or z.shape[0] == 0 or z.shape[1] < 2:
        raise ValueError(
            f"expected logits of shape (n, C) with n >= 1 and C >= 2, got shape {z.shape}"
        )
    if not np.isfinite(z).all():
        raise ValueError("expected finite logits, got nan or inf entries")
    if labels is None:
        return z, None
    y = _as_1d(labels, "labels")
    _same_length(z, y, "logits", "labels")
    if not np.issubdtype(y.dtype, np.integer):
        raise TypeError(f"expected labels to be integer class indices, got dtype {y.dtype}")
    bad = (y < 0) | (y >= z.shape[1])
    if bad.any():
        raise ValueError(
            f"expected labels in [0, {z.shape[1] - 1}], got {np.unique(y[bad])[:10].tolist()}"
        )
    return z, y.astype(np.int64)


def _check_temperature(temperature: float) -> float:
    if isinstance(temperature, bool) or not isinstance(temperature, (int, float, np.number)):
        raise TypeError(f"expected temperature to be a float > 0, got {type(temperature).__name__}")
    t = float(temperature)
    if not (math.isfinite(t) and t > 0.0):
        raise ValueError(f"expected temperature > 0, got {temperature}")
    return t


def softmax(logits: ArrayLike, *, temperature: float = 1.0) -> np.ndarray:
    """Row-wise softmax of ``logits / temperature`` (numerically stable).

    Args:
        logits: unnormalised scores, shape (n, C). Log-probabilities work too: softmax is
            unchanged by a constant shift per row, so ``softmax(log p / T)`` equals
            ``softmax(z / T)`` for the logits ``z`` behind ``p``.
        temperature: T > 0; T > 1 softens, T < 1 sharpens. The argmax never changes.

    Returns:
        Probabilities, shape (n, C), rows summing to 1.

    Raises:
        ValueError: on a bad shape, non-finite logits or a temperature that is not > 0.
    """
    from scipy.special import softmax as _softmax

    z, _ = _check_logits(logits)
    return _softmax(z / _check_temperature(temperature), axis=1)


def negative_log_likelihood(
    logits: ArrayLike, labels: ArrayLike, *, temperature: float = 1.0
) -> float:
    """Mean negative log-likelihood (cross-entropy, natural log) of the true classes.

    ``NLL(T) = -mean_i log softmax(z_i / T)[y_i]``.

    Args:
        logits: unnormalised scores, shape (n, C).
        labels: true class index per row, shape (n,).
        temperature: T > 0.

    Returns:
        The mean NLL in nats.

    Raises:
        ValueError: on a bad shape, labels outside [0, C) or a temperature that is not > 0.
    """
    from scipy.special import log_softmax

    z, y = _check_logits(logits, labels)
    logp = log_softmax(z / _check_temperature(temperature), axis=1)
    return float(-logp[np.arange(y.size), y].mean())


def fit_temperature(
    logits: ArrayLike, labels: ArrayLike, *, bounds: tuple[float, float] = (0.05, 20.0)
) -> float:
    """Temperature T > 0 that minimises the NLL of ``softmax(logits / T)`` (Guo et al. 2017).

    The NLL is convex in the inverse temperature ``b = 1 / T`` (a log-sum-exp of terms
    linear in b, minus a linear term), so a bounded one-dimensional search over b finds
    the global minimum within ``bounds``. Scaling by one positive T keeps every row's
    argmax, so accuracy and the predicted classes are unchanged.

    Args:
        logits: validation logits, shape (n, C).
        labels: validation class indices, shape (n,).
        bounds: smallest and largest temperature searched, 0 < low < high.

    Returns:
        The fitted temperature (a bound when the optimum lies outside them).

    Raises:
        ValueError: on bad logits or labels, or bounds not 0 < low < high.
    """
    from scipy.optimize import minimize_scalar
    from scipy.special import log_softmax

    z, y = _check_logits(logits, labels)
    lo, hi = (float(b) for b in bounds)
    if not 0.0 < lo < hi:
        raise ValueError(f"expected bounds 0 < low < high, got {bounds}")
    rows = np.arange(y.size)

    def nll(beta: float) -> float:
        return float(-log_softmax(z * beta, axis=1)[rows, y].mean())

    res = minimize_scalar(
        nll, bounds=(1.0 / hi, 1.0 / lo), method="bounded", options={"xatol": 1e-10}
    )
    # The bounded search never evaluates the end points; keep one if it is better.
    best = min((1.0 / hi, 1.0 / lo, float(res.x)), key=nll)
    return 1.0 / best
