"""The patch-level crack map of one frame: per-cell probabilities, classes, boxes, JSON and overlay."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from trainkit.core.jsonsafe import dumps

#: Overlay tint of flagged cells, from the threshold to probability 1: one blue hue going from
#: light to dark (stops of ColorBrewer's sequential "Blues" scheme, values from memory). A
#: probability is not a severity, so no warm colours: amber-to-red reads as a condition-state
#: scale, and ramps ending in yellow (viridis, cividis) read as "caution" at the top. Blue also
#: stands apart from grey concrete, rust stains and vegetation.
_RAMP = np.array([[158, 202, 225], [66, 146, 198], [8, 81, 156]], dtype=float)
#: Fill opacity of flagged cells (0-255): the concrete stays visible under the tint.
_FILL_ALPHA = 110
#: Outline of every flagged cell: the darkest blue, visible on light and dark concrete alike.
_OUTLINE = (8, 48, 107)
#: Largest fill opacity of unflagged cells with ``show_all`` (no outline: not flagged).
_BELOW_ALPHA = 45


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
        warnings: things the caller should know (e.g. a scale outside the training range,
            or a frame unlike the training data).
        familiarity: (rows, cols) float32 familiarity score per cell (larger: less like
            the training data), or None for a model without that output.
        unfamiliar: True when the frame looks unlike the training data (median cell
            familiarity above the model's threshold); None without familiarity.
        reached: (rows, cols) bool, the cell was passed by a cascade's first stage and scored
            by the main network (unpassed cells hold P(none) = 1); None for a single-stage
            model, whose main network scores every cell.
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
    familiarity: np.ndarray | None = field(default=None, repr=False)
    unfamiliar: bool | None = None
    reached: np.ndarray | None = field(default=None, repr=False)

    @property
    def main_model_cells(self) -> int:
        """How many cells the main network scored: those a cascade's first stage passed, or
        every cell of a single-stage model."""
        return int(self.flagged.size if self.reached is None else np.count_nonzero(self.reached))

    @property
    def familiarity_score(self) -> float | None:
        """The frame's familiarity score: the median of its cells' (None without familiarity;
        NaN when the model gave non-finite familiarity, and then :attr:`unfamiliar` is True)."""
        return None if self.familiarity is None else float(np.median(self.familiarity))

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.probabilities.shape)

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
            "main_model_cells": self.main_model_cells,
            "probabilities": np.round(self.probabilities, 4).tolist(),
            "labels": self.labels.tolist(),
            "boxes": self.boxes.tolist(),
            "warnings": list(self.warnings),
            "familiarity_score": self.familiarity_score,
            "unfamiliar": self.unfamiliar,
        }
        if self.gsd_mm:
            d["boxes_mm"] = np.round(self.boxes * self.gsd_mm, 2).tolist()
        return d

    def to_json(self) -> str:
        """The map as JSON text (see :meth:`to_dict`); a value that is not finite is null."""
        return dumps(self.to_dict())

    def overlay(self, rgb: np.ndarray, *, show_all: bool = False):
        """A picture read at a glance; returns a PIL image.

        Flagged cells are outlined and tinted blue, light at the threshold and dark at
        probability 1 (a screening probability, not a severity); each carries a short line
        along its class's crack direction (a small star for crossing cracks); a legend strip
        below the frame explains the marks. With ``show_all``, unflagged cells get a faint
        light-blue tint growing with their probability, without an outline.
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
                        alpha = int(_BELOW_ALPHA * min(1.0, p / max(self.threshold, 1e-6)))
                        draw.rectangle([x0, y0, x1 - 1, y1 - 1], fill=(*_ramp(0.0), alpha))
                    continue
                col = self._flag_colour(p)
                draw.rectangle(
                    [x0, y0, x1 - 1, y1 - 1],
                    fill=(*col, _FILL_ALPHA),
                    outline=(*_OUTLINE, 255),
                    width=line_w,
                )
                self._mark(draw, r, c, (x0, y0, x1, y1), line_w)
        out = Image.alpha_composite(frame, layer).convert("RGB")
        return self._with_legend(out, show_all)

    def _flag_colour(self, p: float) -> tuple[int, int, int]:
        """Light blue at the threshold, dark blue at probability 1."""
        span = max(1e-6, 1.0 - self.threshold)
        return _ramp(min(1.0, max(0.0, (p - self.threshold) / span)))

    def legend_swatches(self, n: int = 6) -> list[tuple[float, tuple[int, int, int]]]:
        """(probability, RGB) of the legend's colour steps, from the threshold to 1."""
        return [(float(p), self._flag_colour(float(p))) for p in np.linspace(self.threshold, 1, n)]

    def legend_text(self, *, show_all: bool = False) -> str:
        """What the legend strip says, word for word."""
        below = " Faint tint, no outline: below the threshold." if show_all else ""
        return (
            f"Outlined cells are flagged: screening probability {self.threshold:.2f} (light) "
            f"to 1.00 (dark); a probability, not a severity.{below} "
            f"Line = crack direction, star = crossing cracks. {int(self.flagged.sum())} of "
            f"{self.flagged.size} cells flagged. Triage aid, not an inspection."
        )

    def _mark(self, draw, r: int, c: int, box: tuple[int, int, int, int], line_w: int) -> None:
        x0, y0, x1, y1 = box
        cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
        half = 0.32 * min(x1 - x0, y1 - y0)
        name = self.cell_class(r, c)
        idx = self.class_names.index(name)
        angle = self.angle_centres[idx] if idx < len(self.angle_centres) else None
        ink, halo = (255, 255, 255, 235), (20, 20, 20, 200)
        if angle is None:  # no single direction: a small star
            arms = [(half * 0.6, a) for a in (0.0, 60.0, 120.0)]
        else:
            arms = [(half, angle)]
        for colour, width in ((halo, line_w + 2), (ink, line_w)):  # white on a dark halo
            for length, a in arms:  # on-screen angle: y grows downward, so the row offset is -sin
                dx, dy = length * np.cos(np.radians(a)), -length * np.sin(np.radians(a))
                draw.line([cx - dx, cy - dy, cx + dx, cy + dy], fill=colour, width=width)

    def _with_legend(self, img, show_all: bool = False):
        """The frame with a legend strip below it: colour steps and wrapped text that fits."""
        from PIL import Image, ImageDraw

        w, h = img.size
        size = max(11, round(w / 80))  # text grows with the frame, readable when scaled down
        font = _legend_font(size)
        pad, line_h = max(6, size // 2), size + max(3, size // 3)
        swatches = self.legend_swatches()
        side = max(2, min(size + 4, (w - 2 * pad) // len(swatches) - 2))  # steps fit the width
        steps_w = len(swatches) * (side + 2)
        beside = w - steps_w - 3 * pad >= 20 * size  # text beside the steps, or below them
        text_x = steps_w + 2 * pad if beside else pad
        text_y = pad if beside else 2 * pad + side
        measure = ImageDraw.Draw(img)
        lines = _wrap(self.legend_text(show_all=show_all), measure, font, w - text_x - pad)
        bar_h = max(text_y + len(lines) * line_h + pad, side + 2 * pad)
        out = Image.new("RGB", (w, h + bar_h), (30, 30, 30))
        out.paste(img, (0, 0))
        d = ImageDraw.Draw(out)
        for i, (_, colour) in enumerate(swatches):
            x = pad + i * (side + 2)
            d.rectangle([x, h + pad, x + side, h + pad + side], fill=colour, outline=(235,) * 3)
        for k, line in enumerate(lines):
            d.text((text_x, h + text_y + k * line_h), line, fill=(235, 235, 235), font=font)
        return out


def _legend_font(size: int):
    from PIL import ImageFont

    try:
        return ImageFont.load_default(size=size)
    except TypeError:  # Pillow < 10.1: one small bitmap size
        return ImageFont.load_default()


def _wrap(text: str, draw, font, width: float) -> list[str]:
    """Greedy word wrap to ``width`` pixels (a single long word stays on its own line)."""
    lines: list[str] = []
    for word in text.split():
        if lines and draw.textlength(f"{lines[-1]} {word}", font=font) <= width:
            lines[-1] = f"{lines[-1]} {word}"
        else:
            lines.append(word)
    return lines
