"""The patch-level crack map of one frame: per-cell probabilities, classes, boxes, JSON and overlay."""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np

#: Overlay tint, from low to high screening probability (cool grey-blue to amber to red).
_RAMP = np.array([[70, 110, 160], [250, 190, 40], [215, 40, 30]], dtype=float)


def _ramp(p: float) -> tuple[int, int, int]:
    x = min(max(p, 0.0), 1.0) * (len(_RAMP) - 1)
    i = min(int(x), len(_RAMP) - 2)
    c = _RAMP[i] + (x - i) * (_RAMP[i + 1] - _RAMP[i])
    return tuple(int(v) for v in c)  # type: ignore[return-value]


@dataclass
class CrackMap:
    """Patch-level crack map of one frame (see the module docstring for the cell rule).

    Attributes:
        probabilities: (rows, cols) float32 screening probability per cell, 1 - P(none).
        labels: (rows, cols) int argmax class per cell.
        class_names: class names; ``class_names[0] == "none"``.
        boxes: (rows, cols, 4) int cell boxes x0, y0, x1, y1 in input pixels (x1, y1 exclusive).
        flagged: (rows, cols) bool, probabilities >= threshold.
        threshold: the model's screening threshold.
        class_probabilities: (rows, cols, C) float32 softmax per cell.
        gsd_mm: the frame's scale if given (mm per pixel).
        angle_centres: angle centre per class in degrees (None for classes without one).
        warnings: things the caller should know (e.g. a scale outside the training range).
    """

    probabilities: np.ndarray
    labels: np.ndarray
    class_names: list[str]
    boxes: np.ndarray
    flagged: np.ndarray
    threshold: float
    class_probabilities: np.ndarray = field(repr=False)
    gsd_mm: float | None = None
    angle_centres: list[float | None] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.probabilities.shape)  # type: ignore[return-value]

    def cell_class(self, r: int, c: int) -> str:
        """Class reported for a cell: the likeliest crack class when the cell is flagged."""
        probs = self.class_probabilities[r, c]
        if self.flagged[r, c]:
            return self.class_names[int(np.argmax(probs[1:]) + 1)]
        return self.class_names[int(np.argmax(probs))]

    def flagged_cells(self) -> list[dict]:
        """The flagged cells, most probable first: row, col, box, probability, class, angle."""
        out = []
        for r, c in zip(*np.nonzero(self.flagged), strict=True):
            name = self.cell_class(r, c)
            idx = self.class_names.index(name)
            angle = self.angle_centres[idx] if idx < len(self.angle_centres) else None
            d = {
                "row": int(r),
                "col": int(c),
                "box": [int(v) for v in self.boxes[r, c]],
                "probability": round(float(self.probabilities[r, c]), 4),
                "class": name,
                "angle_deg": angle,
            }
            if self.gsd_mm:
                d["box_mm"] = [round(float(v) * self.gsd_mm, 2) for v in self.boxes[r, c]]
            out.append(d)
        return sorted(out, key=lambda d: -d["probability"])

    def dominant_class(self) -> str | None:
        """The crack class most flagged cells report (None when nothing is flagged)."""
        cells = self.flagged_cells()
        if not cells:
            return None
        names = [c["class"] for c in cells]
        return max(sorted(set(names)), key=names.count)

    def probability_raster(self, height: int, width: int) -> np.ndarray:
        """(height, width) float32 screening probability, averaged where cells overlap."""
        acc = np.zeros((height, width), np.float32)
        cnt = np.zeros((height, width), np.float32)
        for (x0, y0, x1, y1), p in zip(
            self.boxes.reshape(-1, 4), self.probabilities.ravel(), strict=True
        ):
            acc[y0:y1, x0:x1] += p
            cnt[y0:y1, x0:x1] += 1
        return np.divide(acc, cnt, out=np.zeros_like(acc), where=cnt > 0)

    def to_dict(self) -> dict:
        """Plain JSON-ready dict; boxes also in mm when the scale is known."""
        d = {
            "rows": int(self.probabilities.shape[0]),
            "cols": int(self.probabilities.shape[1]),
            "class_names": list(self.class_names),
            "threshold": float(self.threshold),
            "gsd_mm": self.gsd_mm,
            "max_probability": float(self.probabilities.max()) if self.probabilities.size else 0.0,
            "flagged_cells": int(self.flagged.sum()),
            "probabilities": np.round(self.probabilities, 4).tolist(),
            "labels": self.labels.tolist(),
            "boxes": self.boxes.tolist(),
            "warnings": list(self.warnings),
        }
        if self.gsd_mm:
            d["boxes_mm"] = np.round(self.boxes * self.gsd_mm, 2).tolist()
        return d

    def to_json(self) -> str:
        """The map as JSON text (see :meth:`to_dict`)."""
        return json.dumps(self.to_dict())

    def overlay(self, rgb: np.ndarray, *, show_all: bool = False):
        """A picture read at a glance; returns a PIL image.

        Flagged cells are tinted from amber to red by screening probability and outlined;
        each carries a short line along its class's crack direction (a small star for
        crossing cracks); a legend strip below the frame explains the marks. With
        ``show_all``, unflagged cells get a faint blue-grey tint by probability too.
        """
        from PIL import Image, ImageDraw

        frame = Image.fromarray(np.asarray(rgb, dtype=np.uint8)).convert("RGBA")
        w, h = frame.size
        layer = Image.new("RGBA", frame.size, (0, 0, 0, 0))
        draw = ImageDraw.Draw(layer)
        line_w = max(2, round(min(w, h) / 300))
        rows, cols = self.probabilities.shape
        for r in range(rows):
            for c in range(cols):
                p = float(self.probabilities[r, c])
                x0, y0, x1, y1 = (int(v) for v in self.boxes[r, c])
                if not self.flagged[r, c]:
                    if show_all and p > 0.05:
                        draw.rectangle(
                            [x0, y0, x1 - 1, y1 - 1], fill=(*_ramp(p * 0.5), int(60 * p))
                        )
                    continue
                col = self._flag_colour(p)
                draw.rectangle(
                    [x0, y0, x1 - 1, y1 - 1], fill=(*col, 70), outline=(*col, 255), width=line_w
                )
                self._mark(draw, r, c, (x0, y0, x1, y1), line_w)
        out = Image.alpha_composite(frame, layer).convert("RGB")
        return self._with_legend(out)

    def _flag_colour(self, p: float) -> tuple[int, int, int]:
        """Amber at the threshold, red at probability 1."""
        span = max(1e-6, 1.0 - self.threshold)
        return _ramp(0.5 + 0.5 * min(1.0, max(0.0, (p - self.threshold) / span)))

    def _mark(self, draw, r: int, c: int, box: tuple[int, int, int, int], line_w: int) -> None:
        x0, y0, x1, y1 = box
        cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
        half = 0.32 * min(x1 - x0, y1 - y0)
        name = self.cell_class(r, c)
        idx = self.class_names.index(name)
        angle = self.angle_centres[idx] if idx < len(self.angle_centres) else None
        ink = (255, 255, 255, 235)
        if angle is None:  # no single direction: a small star
            for a in (0.0, 60.0, 120.0):
                dx, dy = half * 0.6 * np.cos(np.radians(a)), -half * 0.6 * np.sin(np.radians(a))
                draw.line([cx - dx, cy - dy, cx + dx, cy + dy], fill=ink, width=line_w)
        else:  # on-screen angle: y grows downward, so the row offset is -sin
            dx, dy = half * np.cos(np.radians(angle)), -half * np.sin(np.radians(angle))
            draw.line(
                [cx - dx, cy - dy, cx + dx, cy + dy], fill=(20, 20, 20, 200), width=line_w + 2
            )
            draw.line([cx - dx, cy - dy, cx + dx, cy + dy], fill=ink, width=line_w)

    def _with_legend(self, img):
        from PIL import Image, ImageDraw

        w, h = img.size
        bar_h = 34
        out = Image.new("RGB", (w, h + bar_h), (30, 30, 30))
        out.paste(img, (0, 0))
        d = ImageDraw.Draw(out)
        n_flag = int(self.flagged.sum())
        x = 8
        for i, p in enumerate(np.linspace(self.threshold, 1.0, 6)):
            d.rectangle([x + 14 * i, h + 9, x + 14 * i + 12, h + 25], fill=self._flag_colour(p))
        x += 14 * 6 + 6
        text = (
            f"flagged: screening probability {self.threshold:.2f} (amber) to 1.00 (red); "
            f"line = crack direction, star = crossing cracks; {n_flag} of {self.flagged.size} cells. "
            "Triage aid, not an inspection."
        )
        d.text((x, h + 11), text, fill=(235, 235, 235))
        return out
