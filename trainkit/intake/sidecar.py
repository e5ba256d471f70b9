"""The sidecar CSV of a photo folder (scale, camera, group, date, region of interest) and ROI geometry."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from trainkit.core.csvfile import read_csv
from trainkit.core.errors import TrainkitError
from trainkit.core.grid import Box

__all__ = ["SIDECAR_COLUMNS", "SidecarError", "read_sidecar", "parse_roi", "roi_fraction"]

SIDECAR_COLUMNS = (
    "photo",
    "gsd_mm",
    "distance_m",
    "focal_mm",
    "sensor_width_mm",
    "structure",
    "group",
    "site",
    "date",
    "roi",
)


class SidecarError(TrainkitError):
    """A sidecar row or region of interest that cannot be used; the message names file and line."""


def read_sidecar(path: str | Path) -> dict[str, dict]:
    """Read a sidecar CSV keyed by photo (file name, or path relative to the input folder).

    Columns (all but ``photo`` optional): ``gsd_mm``; or ``distance_m``, ``focal_mm``,
    ``sensor_width_mm`` (scale by the pinhole relation; ``distance_m`` alone is used with
    EXIF focal lengths); ``structure``, ``group`` or ``site`` (split group); ``date``
    (capture date, YYYY-MM-DD); ``roi`` (region of interest: ``x0 y0 x1 y1`` for a box or
    ``x,y x,y x,y ...`` for a polygon, in upright photo pixels). UTF-8, with or without a
    byte-order mark.

    Raises:
        SidecarError: a missing or unknown column, a bad value; naming the file and line.
        CsvFileError: not UTF-8 text, a field too long, a NUL byte; naming file and line.
    """
    path = Path(path)
    out: dict[str, dict] = {}
    with read_csv(path, "sidecar") as reader:
        if reader.fieldnames is None or "photo" not in reader.fieldnames:
            raise SidecarError(
                f"sidecar {path.name}: expected a header with a 'photo' column, got {reader.fieldnames}"
            )
        unknown = [c for c in reader.fieldnames if c not in SIDECAR_COLUMNS]
        if unknown:
            raise SidecarError(
                f"sidecar {path.name}: unknown columns {unknown}; valid: {', '.join(SIDECAR_COLUMNS)}"
            )
        for i, row in reader:
            name = (row.get("photo") or "").strip()
            if not name:
                raise SidecarError(f"sidecar {path.name} line {i}: empty 'photo'")
            if Path(name).is_absolute() or ".." in Path(name).parts:
                raise SidecarError(
                    f"sidecar {path.name} line {i}: photo {name!r} must be a relative name"
                )
            rec: dict = {}
            for key in ("gsd_mm", "distance_m", "focal_mm", "sensor_width_mm"):
                v = (row.get(key) or "").strip()
                if v:
                    try:
                        rec[key] = float(v)
                    except ValueError:
                        raise SidecarError(
                            f"sidecar {path.name} line {i}: {key} {v!r} is not a number"
                        ) from None
                    if not (math.isfinite(rec[key]) and rec[key] > 0):
                        raise SidecarError(
                            f"sidecar {path.name} line {i}: {key} must be positive and "
                            f"finite, got {v}"
                        )
            grp = (row.get("structure") or row.get("group") or row.get("site") or "").strip()
            if grp:
                rec["group"] = grp
            date = (row.get("date") or "").strip()
            if date:
                rec["date"] = _check_date(date, f"sidecar {path.name} line {i}")
            roi = (row.get("roi") or "").strip()
            if roi:
                parse_roi(roi, f"sidecar {path.name} line {i}")  # validate now, use later
                rec["roi"] = roi
            out[name] = rec
    return out


def _check_date(text: str, where: str) -> str:
    import datetime as dt

    try:
        return dt.date.fromisoformat(text).isoformat()
    except ValueError:
        raise SidecarError(f"{where}: date {text!r} is not YYYY-MM-DD") from None


def parse_roi(text: str, where: str = "roi") -> np.ndarray:
    """Polygon vertices (K, 2) as x, y from ``x0 y0 x1 y1`` (a box) or ``x,y x,y x,y ...``."""
    try:
        if "," in text:
            pts = [
                tuple(float(v) for v in tok.split(",")) for tok in text.replace(";", " ").split()
            ]
            if len(pts) < 3 or any(len(p) != 2 for p in pts):
                raise ValueError
            return np.array(pts, dtype=float)
        x0, y0, x1, y1 = (float(v) for v in text.split())
    except ValueError:
        raise SidecarError(
            f"{where}: region of interest {text!r} must be 'x0 y0 x1 y1' or at least three 'x,y' points"
        ) from None
    if not (x1 > x0 and y1 > y0):
        raise SidecarError(f"{where}: box {text!r} needs x1 > x0 and y1 > y0")
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=float)


def roi_fraction(roi: np.ndarray, box: Box, height: int, width: int) -> float:
    """Share of a box's pixels inside the region of interest polygon (rasterised with OpenCV)."""
    import cv2

    x0, y0, x1, y1 = box
    mask = np.zeros((y1 - y0, x1 - x0), np.uint8)
    pts = np.round((roi - [x0, y0]) * 16).astype(np.int32)  # 4 fractional bits
    cv2.fillPoly(mask, [pts], 1, lineType=cv2.LINE_8, shift=4)
    return float(mask.mean())
