"""Quality measures of a patch (focus, exposure, texture) and the flags they raise."""

from __future__ import annotations

import numpy as np

#: Quality thresholds (common practice, tuned on the synthetic set; adjust per camera).
FOCUS_MIN = 20.0  # variance of the Laplacian of the grey patch below this -> "blurred"
CLIPPED_MAX = 0.25  # fraction of grey pixels at <= 2 or >= 253 above this -> "exposure"
TEXTURE_MIN_STD = 2.0  # grey standard deviation below this -> "low_texture"


def quality_measures(patch_rgb: np.ndarray) -> dict:
    """Focus (variance of the Laplacian), clipped fraction and quality flags of a patch."""
    import cv2

    grey = cv2.cvtColor(patch_rgb, cv2.COLOR_RGB2GRAY)
    focus = float(cv2.Laplacian(grey, cv2.CV_64F).var())
    clipped = float(np.mean((grey <= 2) | (grey >= 253)))
    flags = []
    if focus < FOCUS_MIN:
        flags.append("blurred")
    if clipped > CLIPPED_MAX:
        flags.append("exposure")
    if float(grey.std()) < TEXTURE_MIN_STD:
        flags.append("low_texture")
    return {"focus": focus, "clipped": clipped, "flags": ",".join(flags)}
