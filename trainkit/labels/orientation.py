"""Classical dominant-orientation estimate of a patch by the structure tensor.

Method: Bigün, J. and Granlund, G. H. (1987), "Optimal orientation detection of
linear symmetry" (ICCV). The gradient products J_xx, J_yy, J_xy (x = columns,
y = rows pointing down) are summed over the patch; the line direction is

    theta = 0.5 * atan2(2 J_xy, J_yy - J_xx)  mod 180 degrees,

counter-clockwise from +x as seen on screen (the kit's angle convention, see
:mod:`trainkit.core.taxonomy`), and the coherency (l1 - l2) / (l1 + l2) of the tensor's
eigenvalues says how clearly one direction dominates (1: a single straight line,
0: no preferred direction).

Cracks are dark and thin while concrete texture is broad and mottled, so the
tensor is computed on a black top-hat response (grey closing minus grey, which keeps
dark structures narrower than the structuring element) of a lightly smoothed grey
patch, rather than on the raw grey values.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from trainkit.core.errors import TrainkitError
from trainkit.core.taxonomy import ClassSet

__all__ = ["Orientation", "dominant_orientation", "structure_tensor_sums", "ridge_response"]

#: Below this coherency the estimate is reported as "no clear direction". Chosen on
#: synthetic patches (straight cracks reach 0.6-0.95, clean texture and map cracking
#: stay below about 0.3); a rule of thumb, not a published value.
MIN_COHERENCY = 0.35
#: Below this mean ridge energy (per pixel, grey in 0..1) the patch shows no dark line.
MIN_ENERGY = 2e-5


class OrientationError(TrainkitError):
    """The image given for an orientation estimate cannot be used."""


@dataclass(frozen=True)
class Orientation:
    """A dominant-orientation estimate.

    Attributes:
        angle_deg: line direction in [0, 180), on-screen convention.
        coherency: (l1 - l2) / (l1 + l2) in [0, 1].
        energy: mean tensor trace per pixel (how much dark-line structure there is).
        clear: True when one direction dominates (coherency and energy above the limits).
    """

    angle_deg: float
    coherency: float
    energy: float
    clear: bool

    def describe(self, class_set: ClassSet) -> str:
        """One line for the reviewer: angle and the class it falls in, or no clear direction."""
        if not self.clear:
            return f"no clear direction (coherency {self.coherency:.2f})"
        if not class_set.oriented_indices:
            return f"line at {self.angle_deg:.0f} deg (coherency {self.coherency:.2f})"
        cls = class_set.names[class_set.class_for_angle(self.angle_deg)]
        return f"{self.angle_deg:.0f} deg -> {cls} (coherency {self.coherency:.2f})"


def _grey(image: np.ndarray) -> np.ndarray:
    a = np.asarray(image)
    if a.ndim == 3 and a.shape[2] in (3, 4):
        a = a[..., :3].mean(axis=2)
    if a.ndim != 2 or min(a.shape) < 8:
        raise OrientationError(
            f"expected a grey (H, W) or RGB (H, W, 3) image of at least 8 x 8, got shape {a.shape}"
        )
    a = a.astype(float)
    return a / 255.0 if np.asarray(image).dtype == np.uint8 else a


def ridge_response(image: np.ndarray, *, width_px: int = 9, smooth: float = 1.0) -> np.ndarray:
    """Black top-hat of the lightly smoothed grey image: bright where dark thin lines are.

    Args:
        image: (H, W) grey or (H, W, 3) RGB; uint8 is scaled to 0..1.
        width_px: side of the square structuring element; lines narrower than it respond.
        smooth: Gaussian sigma in pixels applied first, to quiet pixel noise.
    """
    g = ndimage.gaussian_filter(_grey(image), smooth)
    return ndimage.grey_closing(g, size=(width_px, width_px)) - g


def structure_tensor_sums(image: np.ndarray, *, sigma: float = 1.0) -> tuple[float, float, float]:
    """Gradient products summed over the image: (J_xx, J_xy, J_yy), y = rows downward.

    Gradients are Gaussian derivatives of scale ``sigma`` (the same as skimage's
    ``structure_tensor``, whose integration window is irrelevant once summed).
    """
    img = np.asarray(image, dtype=float)
    gy = ndimage.gaussian_filter(img, sigma, order=(1, 0), mode="nearest")
    gx = ndimage.gaussian_filter(img, sigma, order=(0, 1), mode="nearest")
    return float((gx * gx).sum()), float((gx * gy).sum()), float((gy * gy).sum())


def tensor_angle(jxx: float, jxy: float, jyy: float) -> tuple[float, float]:
    """Line angle in [0, 180) and coherency from summed tensor components (module formula)."""
    angle = float(np.degrees(0.5 * np.arctan2(2.0 * jxy, jyy - jxx)) % 180.0)
    trace = jxx + jyy
    coherency = float(np.hypot(jxx - jyy, 2.0 * jxy) / trace) if trace > 0 else 0.0
    return angle, coherency


def dominant_orientation(
    image: np.ndarray,
    *,
    ridge: bool = True,
    sigma: float = 1.0,
    min_coherency: float = MIN_COHERENCY,
) -> Orientation:
    """Dominant line direction of a patch by the structure tensor.

    Args:
        image: (H, W, 3) RGB or (H, W) grey; uint8 is scaled to 0..1.
        ridge: weight toward dark thin structures via :func:`ridge_response` (the
            default); False runs the tensor on the inverted grey image directly.
        sigma: Gaussian derivative scale in pixels.
        min_coherency: below it the estimate is not ``clear``.

    Returns:
        The :class:`Orientation`.
    """
    src = ridge_response(image) if ridge else 1.0 - _grey(image)
    jxx, jxy, jyy = structure_tensor_sums(src, sigma=sigma)
    angle, coherency = tensor_angle(jxx, jxy, jyy)
    energy = (jxx + jyy) / src.size
    return Orientation(
        angle_deg=angle,
        coherency=coherency,
        energy=float(energy),
        clear=bool(coherency >= min_coherency and energy >= MIN_ENERGY),
    )
