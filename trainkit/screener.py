"""ONNX-only inference: load an exported screener and turn a frame into a patch-level crack map.

This module imports neither torch nor torchvision: a downstream tool needs only
numpy, pillow and onnxruntime (``pip install --no-deps trainkit`` plus
``pip install numpy pillow onnxruntime``).

Cell rule: cells are ``patch_px`` squares (or, when the frame's scale ``gsd_mm``
and the model's ``patch_mm`` are known, squares covering ``patch_mm`` of surface,
resampled to ``patch_px``). They start at the top-left corner and step by the
stride; the last row and column are shifted inward to end at the frame border,
so every pixel is covered and none is padded. A frame smaller than one cell is
edge-padded to a single cell.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .tiling import axis_starts

__all__ = ["Screener", "CrackMap", "ScreenerError"]

_REQUIRED_META = ("class_names", "patch_px", "threshold")

#: Overlay colours per class index (RGB); class 0 is never drawn.
_PALETTE = [
    (235, 235, 235),
    (230, 85, 13),
    (49, 130, 189),
    (117, 107, 177),
    (49, 163, 84),
    (222, 45, 38),
    (253, 174, 107),
    (158, 202, 225),
]


class ScreenerError(ValueError):
    """The model file or the input frame cannot be used; the message says why."""


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
    """

    probabilities: np.ndarray
    labels: np.ndarray
    class_names: list[str]
    boxes: np.ndarray
    flagged: np.ndarray
    threshold: float
    class_probabilities: np.ndarray = field(repr=False)
    gsd_mm: float | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.probabilities.shape)  # type: ignore[return-value]

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
        }
        if self.gsd_mm:
            d["boxes_mm"] = np.round(self.boxes * self.gsd_mm, 2).tolist()
        return d

    def to_json(self) -> str:
        """The map as JSON text (see :meth:`to_dict`)."""
        return json.dumps(self.to_dict())

    def overlay(self, rgb: np.ndarray, *, alpha: float = 0.45):
        """The frame with flagged cells tinted by class and outlined; returns a PIL image."""
        from PIL import Image, ImageDraw

        base = Image.fromarray(np.asarray(rgb, dtype=np.uint8)).convert("RGBA")
        layer = Image.new("RGBA", base.size, (0, 0, 0, 0))
        draw = ImageDraw.Draw(layer)
        rows, cols = self.probabilities.shape
        for r in range(rows):
            for c in range(cols):
                if not self.flagged[r, c]:
                    continue
                x0, y0, x1, y1 = (int(v) for v in self.boxes[r, c])
                colour = _PALETTE[int(self.labels[r, c]) % len(_PALETTE)]
                a = int(255 * alpha * (0.5 + 0.5 * float(self.probabilities[r, c])))
                draw.rectangle(
                    [x0, y0, x1 - 1, y1 - 1],
                    fill=(*colour, a // 2),
                    outline=(*colour, 255),
                    width=2,
                )
                label = int(self.labels[r, c])
                # A cell can be flagged while "none" is its single likeliest class: the
                # crack classes together outweigh the threshold. Say so rather than "none".
                name = self.class_names[label] if label != 0 else "crack?"
                draw.text(
                    (x0 + 3, y0 + 2),
                    f"{name} {self.probabilities[r, c]:.2f}",
                    fill=(255, 255, 255, 255),
                )
        return Image.alpha_composite(base, layer).convert("RGB")


class Screener:
    """An exported crack screener (ONNX), run with ONNX Runtime on the CPU.

    Args:
        path: the ``model.onnx`` written by ``trainkit export``.
        threads: ONNX Runtime intra-op threads (None = its default, all cores).
    """

    def __init__(self, path: str | Path, threads: int | None = None) -> None:
        self.path = Path(path)
        self.threads = threads
        self._session = None
        self.metadata = self._read_and_validate()

    def _read_and_validate(self) -> dict:
        import onnxruntime as ort

        if not self.path.is_file():
            raise ScreenerError(f"model file {self.path} does not exist")
        opts = ort.SessionOptions()
        if self.threads:
            opts.intra_op_num_threads = int(self.threads)
        try:
            self._session = ort.InferenceSession(
                str(self.path), opts, providers=["CPUExecutionProvider"]
            )
        except Exception as exc:
            raise ScreenerError(f"{self.path.name} is not a loadable ONNX model ({exc})") from None
        meta = dict(self._session.get_modelmeta().custom_metadata_map)
        missing = [k for k in _REQUIRED_META if k not in meta]
        if missing:
            raise ScreenerError(
                f"{self.path.name} lacks trainkit metadata {missing}; export it with `trainkit export`"
            )
        inputs = self._session.get_inputs()
        if len(inputs) != 1 or inputs[0].name != "image" or inputs[0].type != "tensor(uint8)":
            raise ScreenerError(
                f"{self.path.name}: expected one uint8 input named 'image', got "
                f"{[(i.name, i.type) for i in inputs]}"
            )
        self.class_names: list[str] = json.loads(meta["class_names"])
        self.patch_px = int(meta["patch_px"])
        self.threshold = float(json.loads(meta["threshold"]))
        pmm = json.loads(meta.get("patch_mm", "null"))
        self.patch_mm: float | None = None if pmm is None else float(pmm)
        if not self.class_names or self.class_names[0] != "none":
            raise ScreenerError(
                f"{self.path.name}: class 0 must be 'none', got {self.class_names[:1]}"
            )
        return meta

    def predict(self, patches: np.ndarray, *, batch_size: int = 64) -> np.ndarray:
        """Class probabilities (N, C) for uint8 patches (N, S, S, 3)."""
        patches = np.asarray(patches)
        if (
            patches.dtype != np.uint8
            or patches.ndim != 4
            or patches.shape[1:] != (self.patch_px, self.patch_px, 3)
        ):
            raise ScreenerError(
                f"expected uint8 patches of shape (n, {self.patch_px}, {self.patch_px}, 3), "
                f"got {patches.dtype} {patches.shape}"
            )
        out = [np.zeros((0, len(self.class_names)), dtype=np.float32)]
        for i in range(0, len(patches), batch_size):
            out.append(
                self._session.run(["probabilities"], {"image": patches[i : i + batch_size]})[0]
            )
        return np.concatenate(out)

    def crack_map(
        self, rgb: np.ndarray, stride: int | None = None, gsd_mm: float | None = None
    ) -> CrackMap:
        """Screen one frame: (H, W, 3) uint8 RGB -> :class:`CrackMap`.

        Args:
            rgb: the frame.
            stride: step between cells in model pixels (default: the patch size, no overlap).
            gsd_mm: the frame's scale in mm per pixel; with the model's patch_mm the frame
                is resampled so one cell covers patch_mm of surface.
        """
        rgb = np.asarray(rgb)
        if rgb.dtype != np.uint8 or rgb.ndim != 3 or rgb.shape[2] != 3:
            raise ScreenerError(
                f"expected an (H, W, 3) uint8 RGB frame, got {rgb.dtype} {rgb.shape}"
            )
        s = self.patch_px
        stride = s if stride is None else int(stride)
        if not 1 <= stride <= s:
            raise ScreenerError(f"stride must be between 1 and {s}, got {stride}")
        h, w = rgb.shape[:2]
        factor = 1.0
        work = rgb
        if gsd_mm is not None and self.patch_mm:
            if not gsd_mm > 0:
                raise ScreenerError(f"gsd_mm must be positive, got {gsd_mm}")
            factor = s / (self.patch_mm / gsd_mm)  # model pixels per frame pixel
            if abs(factor - 1.0) > 1e-3:
                from PIL import Image

                nw, nh = max(1, round(w * factor)), max(1, round(h * factor))
                work = np.asarray(Image.fromarray(rgb).resize((nw, nh), Image.BILINEAR))
        wh, ww = work.shape[:2]
        ys, xs = axis_starts(wh, s, stride), axis_starts(ww, s, stride)
        patches = np.empty((len(ys) * len(xs), s, s, 3), dtype=np.uint8)
        boxes = np.empty((len(ys), len(xs), 4), dtype=np.int64)
        k = 0
        for r, y0 in enumerate(ys):
            for c, x0 in enumerate(xs):
                p = work[y0 : y0 + s, x0 : x0 + s]
                if p.shape[:2] != (s, s):
                    p = np.pad(p, ((0, s - p.shape[0]), (0, s - p.shape[1]), (0, 0)), mode="edge")
                patches[k] = p
                k += 1
                x1, y1 = min(x0 + s, ww), min(y0 + s, wh)
                boxes[r, c] = [
                    int(round(x0 / factor)),
                    int(round(y0 / factor)),
                    min(w, int(round(x1 / factor))),
                    min(h, int(round(y1 / factor))),
                ]
        probs = self.predict(patches).reshape(len(ys), len(xs), -1)
        screen = np.clip(1.0 - probs[..., 0], 0.0, 1.0).astype(np.float32)
        return CrackMap(
            probabilities=screen,
            labels=probs.argmax(-1),
            class_names=list(self.class_names),
            boxes=boxes,
            flagged=screen >= self.threshold,
            threshold=self.threshold,
            class_probabilities=probs.astype(np.float32),
            gsd_mm=gsd_mm,
        )
