"""Score how unfamiliar a patch, and a frame, is to the data a screener was trained on.

The detector of Lee, Lee, Lee and Shin, "A simple unified framework for detecting
out-of-distribution samples and adversarial attacks" (NeurIPS 2018): fit a Gaussian per
class to a layer's features with one shared (tied) covariance, and score a vector by its
smallest Mahalanobis distance to a class mean (:func:`fit`, :func:`scores`). The paper
scores with the (negated) squared distance; here the distance itself, so it compares
directly with ``scipy.spatial.distance.mahalanobis``. Larger means less familiar.

Feature ensemble (the paper's section 2, "feature ensemble"): the distance is computed on
the global-average-pooled feature maps of several layers (one per network stage, plus the
penultimate features) and the per-layer scores are combined. The paper weights them by a
logistic regression fitted on validation outliers; without outlier data this kit divides
each layer's distance by its median on the training patches (:func:`layer_scale`) and
averages (:func:`ensemble_scores`), so a typical training patch scores about 1 (the
validation photos are kept apart for the frame threshold, so its guarantee holds).
The early stages are there because a new surface changes colour and texture statistics
that the classifier's last layer learns to ignore (benchmarks/results/lab_notes.md).

Choices of this kit (documented, not from the paper):

- projection: features of more than ``k`` dimensions are projected onto their first ``k``
  principal components (PCA fitted on the training features, ``k = 64`` by default), so
  the summary stored inside the ONNX model stays small (``k x d`` + ``k x k`` + classes).
  A change of surface that moves features only along directions outside the kept ``k``
  is not seen, and a small shift in many dimensions is seen only in part
  (benchmarks/results/lab_notes.md); raise ``k`` or pass None;
- shrinkage: the tied covariance is shrunk toward a scaled identity with the
  Ledoit-Wolf coefficient (Ledoit and Wolf 2004, "A well-conditioned estimator for
  large-dimensional covariance matrices", J. Multivariate Analysis 88), computed here in
  numpy, so the precision matrix stays stable with few training vectors per dimension;
- frames: a frame is unfamiliar when the median of its cells' scores exceeds the
  threshold (:func:`frame_score`). The median ignores a minority of odd cells (sky,
  railings, the frame's border) yet fires when most of the surface is unlike the
  training data. The threshold is calibrated on frames, not patches: the same median on
  each validation photo (:func:`group_medians`), then a split-conformal quantile of those
  (:func:`frame_threshold`, 5 % tolerated false warnings by default), so a new frame like
  the validation photos is warned about with probability at most that bound.

numpy only: this module runs inside the torch-free Screener.
"""

from __future__ import annotations

import base64
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from trainkit.core.errors import TrainkitError

__all__ = [
    "SUMMARY_FORMAT",
    "FamiliarityError",
    "FamiliaritySummary",
    "fit",
    "frame_score",
    "ledoit_wolf_shrinkage",
    "scores",
    "layer_scale",
    "ensemble_scores",
    "group_medians",
    "frame_threshold",
]

#: Principal directions whose singular value is below this share of the largest are dropped.
RANK_FLOOR = 1e-3

#: Format tag written into every summary dict.
SUMMARY_FORMAT = "trainkit-familiarity-1"


class FamiliarityError(TrainkitError):
    """Features, labels, options or a stored summary the detector cannot use."""


def _encode(a: np.ndarray) -> dict[str, Any]:
    arr = np.ascontiguousarray(a, dtype="<f4")
    return {"shape": list(arr.shape), "float32_base64": base64.b64encode(arr.tobytes()).decode()}


def _decode(d: Any, name: str) -> np.ndarray:
    try:
        raw = base64.b64decode(d["float32_base64"], validate=True)
        return np.frombuffer(raw, dtype="<f4").reshape(d["shape"]).astype(np.float32)
    except (KeyError, TypeError, ValueError) as exc:
        raise FamiliarityError(f"familiarity summary field {name!r} is malformed: {exc}") from exc


@dataclass(frozen=True)
class FamiliaritySummary:
    """What the detector keeps of the training features (all float32).

    Attributes:
        mean: (d,) mean of the training features (the projection's centre).
        components: (k, d) principal directions, or None when no projection is used.
        class_means: (C, k) class means in the projected space.
        precision: (k, k) inverse of the shrunk tied covariance.
        shrinkage: the Ledoit-Wolf coefficient used, in [0, 1].
    """

    mean: np.ndarray
    components: np.ndarray | None
    class_means: np.ndarray
    precision: np.ndarray
    shrinkage: float

    @property
    def dim(self) -> int:
        """Dimension d of the raw features."""
        return int(self.mean.shape[0])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; arrays as little-endian float32 bytes in base64 with shapes."""
        return {
            "format": SUMMARY_FORMAT,
            "mean": _encode(self.mean),
            "components": None if self.components is None else _encode(self.components),
            "class_means": _encode(self.class_means),
            "precision": _encode(self.precision),
            "shrinkage": float(self.shrinkage),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FamiliaritySummary:
        """Read a dict written by :meth:`to_dict`.

        Raises:
            FamiliarityError: on another format tag or malformed fields.
        """
        if not isinstance(d, dict) or d.get("format") != SUMMARY_FORMAT:
            got = d.get("format") if isinstance(d, dict) else type(d).__name__
            raise FamiliarityError(
                f"expected a familiarity summary of format {SUMMARY_FORMAT!r}, got {got!r}"
            )
        comp = d.get("components")
        return cls(
            mean=_decode(d.get("mean"), "mean"),
            components=None if comp is None else _decode(comp, "components"),
            class_means=_decode(d.get("class_means"), "class_means"),
            precision=_decode(d.get("precision"), "precision"),
            shrinkage=float(d.get("shrinkage", 0.0)),
        )

    def project(self, features: np.ndarray) -> np.ndarray:
        """Centre (and project) raw features: (n, d) -> (n, k) float64."""
        centred = features.astype(np.float64) - self.mean.astype(np.float64)
        if self.components is None:
            return centred
        return centred @ self.components.astype(np.float64).T


def _features(features: ArrayLike, name: str = "features") -> np.ndarray:
    x = np.asarray(features, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise FamiliarityError(f"expected {name} of shape (n, d) with n, d >= 1, got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise FamiliarityError(f"expected finite {name}, got nan or inf entries")
    return x


def ledoit_wolf_shrinkage(centred: np.ndarray) -> tuple[np.ndarray, float]:
    """Ledoit-Wolf shrunk covariance of already-centred rows and its coefficient.

    With ``S = X^T X / n``, ``mu = tr(S) / p``, ``d2 = ||S - mu I||_F^2 / p`` and
    ``b2 = min(d2, sum_i ||x_i x_i^T - S||_F^2 / (n^2 p))``, the estimate is
    ``(1 - b2/d2) S + (b2/d2) mu I`` (Ledoit and Wolf 2004, Lemma 3.2 / eq. 14, norms
    scaled by 1/p as in the paper).

    Args:
        centred: (n, p) rows with their mean (or class means) already removed.

    Returns:
        The (p, p) shrunk covariance and the coefficient in [0, 1].
    """
    n, p = centred.shape
    s = centred.T @ centred / n
    mu = np.trace(s) / p
    d2 = float(np.sum((s - mu * np.eye(p)) ** 2)) / p
    if d2 <= 0.0:
        return s, 0.0
    # sum_i ||x_i x_i^T - S||_F^2 = sum_i ||x_i||^4 - n ||S||_F^2 (expanding the square).
    sq = np.sum(centred**2, axis=1)
    b_bar2 = float(np.sum(sq**2) - n * np.sum(s**2)) / (n**2 * p)
    delta = min(max(b_bar2, 0.0), d2) / d2
    return (1.0 - delta) * s + delta * mu * np.eye(p), delta


def fit(
    features: ArrayLike, labels: ArrayLike, *, k: int | None = 64, shrink: bool = True
) -> FamiliaritySummary:
    """Fit class means and a shared shrunk covariance to training features.

    Args:
        features: (n, d) penultimate-layer features of the training patches.
        labels: (n,) integer class of each patch (every class present is one Gaussian).
        k: project onto this many principal components (capped at ``min(d, n - 1)`` and at the
            number of directions whose singular value is above RANK_FLOOR of the largest);
            None keeps the d raw dimensions (centred only).
        shrink: apply Ledoit-Wolf shrinkage (False: the plain pooled covariance, which
            must then be invertible).

    Returns:
        The :class:`FamiliaritySummary`.

    Raises:
        FamiliarityError: on malformed features or labels, k < 1, or a singular
            covariance without shrinkage.
    """
    x = _features(features)
    y = np.asarray(labels)
    if y.shape != (x.shape[0],) or y.dtype.kind not in "iub":
        raise FamiliarityError(
            f"expected integer labels of shape ({x.shape[0]},), got {y.dtype} of shape {y.shape}"
        )
    if x.shape[0] < 2:
        raise FamiliarityError(f"expected at least 2 training vectors, got {x.shape[0]}")
    if k is not None and (isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1):
        raise FamiliarityError(f"expected k to be an int >= 1 or None, got {k!r}")
    mean = x.mean(axis=0)
    centred = x - mean
    components = None
    if k is not None:
        k_used = int(min(k, x.shape[1], x.shape[0] - 1))
        # Rows of vt are the principal directions, ordered by singular value.
        _, sv, vt = np.linalg.svd(centred, full_matrices=False)
        # Directions with next to no spread (features of a weakly trained network can
        # collapse onto a few) would get an enormous precision that float32 arithmetic in
        # the exported graph cannot reproduce: keep only those above RANK_FLOOR of the largest.
        k_used = max(1, min(k_used, int(np.sum(sv > RANK_FLOOR * sv[0])) if sv[0] > 0 else 1))
        components = vt[:k_used]
        centred = centred @ components.T
    classes = np.unique(y)
    means = np.stack([centred[y == c].mean(axis=0) for c in classes])
    resid = centred - means[np.searchsorted(classes, y)]
    if shrink:
        cov, delta = ledoit_wolf_shrinkage(resid)
    else:
        cov, delta = resid.T @ resid / resid.shape[0], 0.0
    try:
        precision = np.linalg.inv(cov)
    except np.linalg.LinAlgError as exc:
        raise FamiliarityError(
            "the tied covariance is singular; fit with shrink=True or a smaller k"
        ) from exc
    return FamiliaritySummary(
        mean=mean.astype(np.float32),
        components=None if components is None else components.astype(np.float32),
        class_means=means.astype(np.float32),
        precision=((precision + precision.T) / 2).astype(np.float32),
        shrinkage=float(delta),
    )


def scores(summary: FamiliaritySummary, features: ArrayLike) -> np.ndarray:
    """Smallest Mahalanobis distance of each vector to a class mean.

    Args:
        summary: a fitted :class:`FamiliaritySummary`.
        features: (n, d) raw features, d as in training.

    Returns:
        (n,) float64 distances (larger: less familiar).

    Raises:
        FamiliarityError: on a feature dimension other than the summary's.
    """
    x = _features(features)
    if x.shape[1] != summary.dim:
        raise FamiliarityError(
            f"expected features of dimension {summary.dim} (as in training), got {x.shape[1]}"
        )
    z = summary.project(x)
    prec = summary.precision.astype(np.float64)
    best = np.full(z.shape[0], np.inf)
    for m in summary.class_means.astype(np.float64):
        diff = z - m
        d2 = np.einsum("ij,jk,ik->i", diff, prec, diff)
        best = np.minimum(best, d2)
    return np.sqrt(np.maximum(best, 0.0))


def layer_scale(distances: ArrayLike) -> float:
    """A layer's scale in the feature ensemble: the median of in-distribution distances.

    Dividing a layer's distance by it makes layers of different dimension comparable (a
    typical patch of the data it came from scores 1 in every layer). The export uses the
    training patches, keeping the validation photos for :func:`frame_threshold`.

    Raises:
        FamiliarityError: on empty, non-finite or all-zero distances.
    """
    d = np.asarray(distances, dtype=np.float64).ravel()
    if d.size == 0 or not np.all(np.isfinite(d)):
        raise FamiliarityError("expected at least one finite distance")
    m = float(np.median(d))
    if not m > 0.0:
        raise FamiliarityError(f"expected a positive median distance, got {m}")
    return m


def ensemble_scores(layer_distances: Sequence[ArrayLike], scales: ArrayLike) -> np.ndarray:
    """The cell score of the feature ensemble: the mean over layers of distance / scale.

    Args:
        layer_distances: per layer, the (n,) distances from :func:`scores`.
        scales: per layer, :func:`layer_scale` of its validation distances.

    Returns:
        (n,) float64 scores; about 1 for a typical in-distribution patch, larger is less
        familiar.

    Raises:
        FamiliarityError: on no layers, or layers and scales of different counts or lengths.
    """
    sc = np.asarray(scales, dtype=np.float64).ravel()
    if len(layer_distances) == 0 or len(layer_distances) != sc.size:
        raise FamiliarityError(
            f"expected one scale per layer, got {len(layer_distances)} layers and {sc.size} scales"
        )
    d = [np.asarray(x, dtype=np.float64).ravel() for x in layer_distances]
    if len({x.size for x in d}) != 1:
        raise FamiliarityError(
            f"expected equally long distances per layer, got {[x.size for x in d]}"
        )
    return np.mean(np.stack(d) / sc[:, None], axis=0)


def group_medians(cell_scores: ArrayLike, groups: Sequence) -> np.ndarray:
    """Median score of each group of cells (a photo or frame), groups in sorted order.

    Args:
        cell_scores: (n,) cell scores.
        groups: (n,) the group (photo name) of each cell.
    """
    s = np.asarray(cell_scores, dtype=np.float64).ravel()
    g = np.asarray(groups)
    if g.shape != s.shape or s.size == 0:
        raise FamiliarityError(f"expected one group per cell score, got {g.shape} for {s.shape}")
    return np.array([np.median(s[g == k]) for k in np.unique(g)])


def frame_threshold(frame_scores: ArrayLike, alpha: float = 0.05) -> tuple[float, float]:
    """The frame threshold: a split-conformal quantile of in-distribution frames' scores.

    With n calibration frames (validation photos) the threshold is the
    ``ceil((n + 1)(1 - alpha))``-th smallest score (Vovk, Gammerman and Shafer 2005;
    Lei et al. 2018, JASA 113, "Distribution-free predictive inference for regression").
    A new frame exchangeable with them exceeds it with probability at most
    ``1 - k / (n + 1)``, which is <= alpha. With fewer than ``1 / alpha - 1`` frames that
    rank does not exist; the largest score is used and the bound is ``1 / (n + 1)``.

    Args:
        frame_scores: (n,) scores of in-distribution frames (:func:`group_medians`).
        alpha: the tolerated share of false warnings, in (0, 1).

    Returns:
        ``(threshold, bound)``: the bound on the false-warning probability it gives.

    Raises:
        FamiliarityError: on empty or non-finite scores or alpha outside (0, 1).
    """
    s = np.sort(np.asarray(frame_scores, dtype=np.float64).ravel())
    if s.size == 0 or not np.all(np.isfinite(s)):
        raise FamiliarityError("expected at least one finite calibration frame score")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0.0 < alpha < 1.0:
        raise FamiliarityError(f"expected alpha in (0, 1), got {alpha!r}")
    n = s.size
    k = min(n, int(np.ceil((n + 1) * (1.0 - float(alpha)) - 1e-9)))  # 1e-9: float rounding
    return float(s[k - 1]), 1.0 - k / (n + 1)


def frame_score(cell_scores: ArrayLike, threshold: float) -> tuple[float, bool]:
    """A frame's familiarity score (median of its cells' scores) and its warning.

    Args:
        cell_scores: scores of the frame's cells (any shape).
        threshold: from :func:`frame_threshold`.

    Returns:
        ``(median score, median > threshold)``.

    Raises:
        FamiliarityError: on no cells.
    """
    s = np.asarray(cell_scores, dtype=np.float64).ravel()
    if s.size == 0:
        raise FamiliarityError("expected at least one cell score for the frame, got none")
    med = float(np.median(s))
    return med, bool(med > float(threshold))
