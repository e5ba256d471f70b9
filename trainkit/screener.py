"""ONNX-only inference: load an exported screener and turn a frame into a patch-level crack map.

This module imports neither torch nor torchvision nor OpenCV: a downstream tool
needs only numpy, pillow and onnxruntime (``pip install --no-deps trainkit`` plus
``pip install numpy pillow onnxruntime``).

Cell rule: cells are ``patch_px`` squares (or, when the frame's scale ``gsd_mm``
and the model's ``patch_mm`` are known, squares covering ``patch_mm`` of surface,
resampled to ``patch_px``). They start at the top-left corner and step by the
stride; the last row and column are shifted inward to end at the frame border,
so every pixel is covered and none is padded. A frame smaller than one cell is
edge-padded to a single cell. With a stride smaller than the patch the cells
overlap; :meth:`CrackMap.probability_raster` then averages the probabilities
where cells overlap.
"""

from __future__ import annotations

import json
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .tiling import axis_starts

__all__ = ["Screener", "CrackMap", "ScreenerError", "FramePatches", "CONTRACT_VERSIONS"]

#: Contract versions this module reads (metadata key ``trainkit.format``).
CONTRACT_VERSIONS = ("trainkit-screener-1",)
_REQUIRED_META = ("trainkit.format", "class_names", "patch_px", "threshold")

#: Overlay tint, from low to high screening probability (cool grey-blue to amber to red).
_RAMP = np.array([[70, 110, 160], [250, 190, 40], [215, 40, 30]], dtype=float)


class ScreenerError(ValueError):
    """The model file or the input frame cannot be used; the message says why."""


_local = threading.local()


def _mark_worker() -> None:
    """Runs once in each Screener worker thread: predict() there must not wait on its own pool."""
    _local.worker = True


def usable_cores() -> int:
    """CPU cores this process may run on (affinity-aware)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


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


@dataclass
class FramePatches:
    """A frame cut into model-sized patches, ready for :meth:`Screener.crack_map_from_patches`."""

    patches: np.ndarray
    boxes: np.ndarray
    height: int
    width: int
    gsd_mm: float | None


class Screener:
    """An exported crack screener (ONNX), run with ONNX Runtime on the CPU.

    Args:
        path: the ``model.onnx`` written by ``trainkit export``.
        threads: how many batches run at once, each on a one-thread ONNX Runtime run
            (None = the cores this process may use). Call :meth:`close` (or use the
            Screener in a ``with`` block) to stop these threads when done.
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
        # Parallel over batches, not inside each operator: one intra-op thread per session
        # run, and as many runs at once as there are cores. On the 2-core test machine this
        # ran MobileNetV3-Small 1.0-1.4x as fast as one run with 2 intra-op threads over
        # five runs of benchmarks/run.py scan (model-only bound; never slower), and
        # 1.17-1.61x in a separate side-by-side study of ONNX Runtime settings: the small
        # depthwise layers leave a second intra-op thread waiting.
        self.workers = int(self.threads or usable_cores())
        opts.intra_op_num_threads = 1
        opts.inter_op_num_threads = 1
        # No busy-waiting between runs: spinning threads would take the cores that decode
        # the next frames while the model runs (measured in benchmarks/run.py scan).
        opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
        self._pool = (
            ThreadPoolExecutor(self.workers, "screener", initializer=_mark_worker)
            if self.workers > 1
            else None
        )
        # The memory arena stays on: turning it off lowered a 12-megapixel scan's peak
        # memory but cost about a quarter of the speed (measured, benchmarks/run.py scan).
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
                f"{self.path.name} lacks trainkit metadata {missing}: not a model made by `trainkit export`"
            )
        if meta["trainkit.format"] not in CONTRACT_VERSIONS:
            raise ScreenerError(
                f"{self.path.name} uses contract {meta['trainkit.format']!r}; this kit reads "
                f"{', '.join(CONTRACT_VERSIONS)} (update trainkit)"
            )
        inputs, outputs = self._session.get_inputs(), self._session.get_outputs()
        if len(inputs) != 1 or inputs[0].name != "image" or inputs[0].type != "tensor(uint8)":
            raise ScreenerError(
                f"{self.path.name}: expected one uint8 input named 'image', got "
                f"{[(i.name, i.type) for i in inputs]}"
            )
        if len(outputs) != 1 or outputs[0].name != "probabilities":
            raise ScreenerError(
                f"{self.path.name}: expected one output named 'probabilities', got {[o.name for o in outputs]}"
            )
        try:
            self.class_names: list[str] = json.loads(meta["class_names"])
            self.patch_px = int(meta["patch_px"])
            self.threshold = float(json.loads(meta["threshold"]))
            pmm = json.loads(meta.get("patch_mm", "null"))
            rng = json.loads(meta.get("gsd_mm_range", "null"))
            centres = json.loads(meta.get("angle_centres", "null"))
        except (ValueError, TypeError) as exc:
            raise ScreenerError(f"{self.path.name}: malformed trainkit metadata ({exc})") from None
        self.patch_mm: float | None = None if pmm is None else float(pmm)
        self.gsd_range: tuple[float, float] | None = (
            None if not rng else (float(rng[0]), float(rng[1]))
        )
        self.angle_centres: list[float | None] = centres or [None] * len(self.class_names)
        if not self.class_names or self.class_names[0] != "none":
            raise ScreenerError(
                f"{self.path.name}: class 0 must be 'none', got {self.class_names[:1]}"
            )
        return meta

    @property
    def executor(self) -> ThreadPoolExecutor | None:
        """The worker threads that run batches (None with one worker). Callers may queue
        their own work there (e.g. decoding the next frame) to keep to one thread per core;
        a :meth:`predict` called from such a task runs its batches in that thread."""
        return self._pool

    def close(self) -> None:
        """Stop the worker threads (the Screener cannot predict afterwards)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        self._closed = True

    def __enter__(self) -> Screener:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def predict(self, patches: np.ndarray, *, batch_size: int = 8) -> np.ndarray:
        """Class probabilities (N, C) for uint8 patches (N, S, S, 3).

        Batches run concurrently on ``workers`` threads (ONNX Runtime sessions accept
        concurrent runs and release the GIL); the result is in input order.
        """
        patches = np.asarray(patches)
        s = self.patch_px
        if patches.dtype != np.uint8 or patches.ndim != 4 or patches.shape[1:] != (s, s, 3):
            raise ScreenerError(
                f"expected uint8 patches of shape (n, {s}, {s}, 3), got {patches.dtype} {patches.shape}"
            )
        if getattr(self, "_closed", False):
            raise ScreenerError("this Screener was closed; create a new one")
        parallel = self._pool is not None and not getattr(_local, "worker", False)
        if parallel:  # small inputs still use every core: at most ceil(n / workers) per batch
            batch_size = max(1, min(batch_size, -(-len(patches) // self.workers)))
        chunks = [patches[i : i + batch_size] for i in range(0, len(patches), batch_size)]

        def run(chunk: np.ndarray) -> np.ndarray:
            return self._session.run(["probabilities"], {"image": chunk})[0]

        outs = (
            list(self._pool.map(run, chunks)) if parallel and len(chunks) > 1 else map(run, chunks)
        )
        return np.concatenate([np.zeros((0, len(self.class_names)), dtype=np.float32), *outs])

    def cut(
        self, rgb: np.ndarray, stride: int | None = None, gsd_mm: float | None = None
    ) -> FramePatches:
        """Resample (when scales are known) and cut a frame into model patches, without inference."""
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
        if gsd_mm is not None:
            if not gsd_mm > 0:
                raise ScreenerError(f"gsd_mm must be positive, got {gsd_mm}")
            if self.patch_mm:
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
        return FramePatches(patches=patches, boxes=boxes, height=h, width=w, gsd_mm=gsd_mm)

    def crack_map_from_patches(self, fp: FramePatches) -> CrackMap:
        """Run the model on a cut frame (see :meth:`cut`) and build its crack map."""
        rows, cols = fp.boxes.shape[:2]
        probs = self.predict(fp.patches).reshape(rows, cols, -1)
        screen = np.clip(1.0 - probs[..., 0], 0.0, 1.0).astype(np.float32)
        warnings = []
        if fp.gsd_mm is not None and self.gsd_range is not None:
            lo, hi = self.gsd_range
            if not (lo * 0.8 <= fp.gsd_mm <= hi * 1.25):
                warnings.append(
                    f"frame scale {fp.gsd_mm:g} mm/px is outside the training range {lo:g}-{hi:g} mm/px; "
                    "recall figures do not apply"
                )
        if fp.gsd_mm is not None and self.patch_mm is None:
            warnings.append("the model was trained without scale; gsd_mm was not used to resample")
        return CrackMap(
            probabilities=screen,
            labels=probs.argmax(-1),
            class_names=list(self.class_names),
            boxes=fp.boxes,
            flagged=screen >= self.threshold,
            threshold=self.threshold,
            class_probabilities=probs.astype(np.float32),
            gsd_mm=fp.gsd_mm,
            angle_centres=list(self.angle_centres),
            warnings=warnings,
        )

    def crack_map(
        self, rgb: np.ndarray, stride: int | None = None, gsd_mm: float | None = None
    ) -> CrackMap:
        """Screen one frame: (H, W, 3) uint8 RGB -> :class:`CrackMap`.

        Args:
            rgb: the frame.
            stride: step between cells in model pixels (default: the patch size, no overlap).
            gsd_mm: the frame's scale in mm per pixel; with the model's patch_mm the frame
                is resampled so one cell covers patch_mm of surface, and a scale far
                outside the training range (beyond 0.8x-1.25x of its ends) adds a warning.
        """
        return self.crack_map_from_patches(self.cut(rgb, stride=stride, gsd_mm=gsd_mm))
