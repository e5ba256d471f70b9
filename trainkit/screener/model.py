"""ONNX-only inference: load an exported screener and turn a frame into a patch-level crack map.

This module imports neither torch nor torchvision nor OpenCV: a downstream tool
needs only numpy, pillow and onnxruntime (``pip install trainkit-concrete``, whose
plain install brings exactly those three).

Cell rule: cells are ``patch_px`` squares (or, when the frame's scale ``gsd_mm``
and the model's ``patch_mm`` are known, squares covering ``patch_mm`` of surface,
resampled to ``patch_px``). They start at the top-left corner and step by the
stride; the last row and column are shifted inward to end at the frame border,
so every pixel is covered and none is padded. A frame smaller than one cell is
edge-padded to a single cell. With a stride smaller than the patch the cells
overlap; :meth:`CrackMap.probability_raster` then averages the probabilities
where cells overlap.

A cascade model (contract 3) runs its cheap first stage on every cell and the main
network only on the cells that stage passes, inside the one ONNX call; its third output
says which cells reached the main network (:attr:`CrackMap.reached`).

Memory: a cut frame keeps the (resampled) frame and the cell grid, and patches are cut batch
by batch as the model asks for them, so no frame-sized array of patches is ever made; a
large frame is resampled in horizontal strips. Outputs are checked: probabilities that are
not finite, outside [0, 1] or do not sum to 1 are refused (a broken model must not pass a
frame as clean), and a frame whose familiarity cannot be computed is said to be unfamiliar.
"""

from __future__ import annotations

import math
import threading
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import cast

import numpy as np

from trainkit.core.contract import (
    FAMILIARITY_NAME,
    INPUT_NAME,
    OUTPUT_NAME,
    REACHED_NAME,
    READABLE_VERSIONS,
    ContractError,
    ModelInfo,
    decode_metadata,
    screening_probability,
)
from trainkit.core.cores import usable_cores
from trainkit.core.errors import TrainkitError
from trainkit.core.familiarity import frame_score
from trainkit.core.grid import axis_starts
from trainkit.screener.crackmap import CrackMap

__all__ = ["Screener", "CrackMap", "ScreenerError", "FramePatches", "CONTRACT_VERSIONS"]

#: Contract versions this module reads (metadata key ``trainkit.format``).
CONTRACT_VERSIONS = READABLE_VERSIONS
#: Largest frame, in pixels, that :meth:`Screener.cut` resamples to (a scale far from the
#: model's could otherwise ask for an image of any size).
MAX_RESAMPLED_PIXELS = 160_000_000
#: Frames above this many pixels are resampled in horizontal strips of about this size
#: (Pillow's whole-frame copy takes 4 bytes a pixel); smaller ones in one piece.
RESAMPLE_STRIP_PIXELS = 8_000_000
#: How far a probability row may sum from 1 (a softmax sums to 1 within float rounding;
#: an int8 model's quantized output within about 0.01).
PROBABILITY_SUM_TOLERANCE = 0.05


class ScreenerError(TrainkitError):
    """The model file or the input frame cannot be used; the message says why."""


_local = threading.local()


def _mark_worker() -> None:
    """Runs once in each Screener worker thread: predict() there must not wait on its own pool."""
    _local.worker = True


@dataclass
class FramePatches:
    """A frame cut into model-sized cells, ready for :meth:`Screener.crack_map_from_patches`.

    The patches are cut on demand (:meth:`batch`), a few at a time, from the (resampled)
    frame: a large frame never has a second, frame-sized array of patches beside it.
    :attr:`patches` gives them all at once, for callers that want the array.
    """

    boxes: np.ndarray
    height: int
    width: int
    gsd_mm: float | None
    source: np.ndarray = field(repr=False)
    starts: tuple[list[int], list[int]] = field(repr=False)
    size: int = 0

    def __len__(self) -> int:
        return len(self.starts[0]) * len(self.starts[1])

    def batch(self, start: int, stop: int) -> np.ndarray:
        """Patches ``start`` to ``stop`` (row-major cell order) as uint8 (n, S, S, 3)."""
        ys, xs = self.starts
        s, src = self.size, self.source
        stop = min(stop, len(self))
        out = np.empty((max(0, stop - start), s, s, 3), dtype=np.uint8)
        for k in range(start, stop):
            y0, x0 = ys[k // len(xs)], xs[k % len(xs)]
            p = src[y0 : y0 + s, x0 : x0 + s]
            if p.shape[:2] != (s, s):  # a frame smaller than one cell: edge-padded
                p = np.pad(p, ((0, s - p.shape[0]), (0, s - p.shape[1]), (0, 0)), mode="edge")
            out[k - start] = p
        return out

    @property
    def patches(self) -> np.ndarray:
        """Every patch, (cells, S, S, 3) uint8 (a new array as large as the frame's cells)."""
        return self.batch(0, len(self))


def _resample(rgb: np.ndarray, nw: int, nh: int) -> np.ndarray:
    """``rgb`` resized to (nh, nw) with Pillow's bilinear filter.

    Frames above :data:`RESAMPLE_STRIP_PIXELS` are resized in horizontal strips, each from
    the source rows its filter reaches (Pillow's ``box`` argument), so only a strip is ever
    copied into Pillow; the strips agree with one whole-frame resize up to one grey level
    (the filter's row positions are rounded differently).
    """
    from PIL import Image

    h, w = rgb.shape[:2]
    if h * w <= RESAMPLE_STRIP_PIXELS and nh * nw <= RESAMPLE_STRIP_PIXELS:
        return np.asarray(
            Image.fromarray(np.ascontiguousarray(rgb)).resize((nw, nh), Image.Resampling.BILINEAR)
        )
    sy = h / nh  # source rows per output row
    reach = (
        max(sy, 1.0) + 2
    )  # the bilinear filter's support (1, scaled when shrinking) and a margin
    rows = max(1, RESAMPLE_STRIP_PIXELS // max(nw, w))
    out = np.empty((nh, nw, 3), dtype=np.uint8)
    for r0 in range(0, nh, rows):
        r1 = min(nh, r0 + rows)
        y0, y1 = r0 * sy, r1 * sy
        a, b = max(0, math.floor(y0 - reach)), min(h, math.ceil(y1 + reach) + 1)
        strip = Image.fromarray(np.ascontiguousarray(rgb[a:b]))
        out[r0:r1] = np.asarray(
            strip.resize((nw, r1 - r0), Image.Resampling.BILINEAR, box=(0, y0 - a, w, y1 - a))
        )
    return out


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
        try:
            self.info: ModelInfo = decode_metadata(meta, self.path.name)
        except ContractError as exc:
            raise ScreenerError(str(exc)) from None
        inputs, outputs = self._session.get_inputs(), self._session.get_outputs()
        if len(inputs) != 1 or inputs[0].name != INPUT_NAME or inputs[0].type != "tensor(uint8)":
            raise ScreenerError(
                f"{self.path.name}: expected one uint8 input named {INPUT_NAME!r}, got "
                f"{[(i.name, i.type) for i in inputs]}"
            )
        shape = inputs[0].shape
        if len(shape) == 4 and all(isinstance(d, int) for d in shape[1:3]):
            if tuple(shape[1:3]) != (self.info.patch_px, self.info.patch_px):
                raise ScreenerError(
                    f"{self.path.name}: metadata patch_px is {self.info.patch_px} but the graph's "
                    f"input is {shape[1]} x {shape[2]} pixels; they must agree"
                )
        want = (
            [OUTPUT_NAME]
            + ([FAMILIARITY_NAME] if self.info.familiarity else [])
            + ([REACHED_NAME] if self.info.cascade else [])
        )
        if [o.name for o in outputs] != want:
            raise ScreenerError(
                f"{self.path.name}: contract {self.info.version} expects outputs {want}, "
                f"got {[o.name for o in outputs]}"
            )
        self._outputs = want
        width = outputs[0].shape[-1] if outputs[0].shape else None
        if isinstance(width, int) and width != len(self.info.class_names):
            raise ScreenerError(
                f"{self.path.name}: metadata has {len(self.info.class_names)} class names but "
                f"the output {OUTPUT_NAME!r} has {width} columns; they must agree"
            )
        #: Things to say once about this model (e.g. what an older contract lacks).
        self.notes: list[str] = []
        if not self.info.familiarity:
            self.notes.append(
                f"{self.path.name} follows contract {self.info.version}, which has no familiarity "
                "output: frames unlike the training data are not detected (export the model "
                "again with this kit to get the unfamiliar-surface warning)"
            )
        self.class_names: list[str] = list(self.info.class_names)
        self.patch_px = self.info.patch_px
        self.threshold = self.info.threshold
        self.patch_mm: float | None = self.info.patch_mm
        self.gsd_range: tuple[float, float] | None = self.info.gsd_mm_range
        self.angle_centres: list[float | None] = list(self.info.angle_centres)
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
        return self.predict_all(patches, batch_size=batch_size)[0]

    def predict_all(
        self, patches: np.ndarray, *, batch_size: int = 8
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Class probabilities (N, C) and familiarity (N,) of uint8 patches (N, S, S, 3).

        The familiarity is None for models without that output (contract version 1).
        """
        outs = self.predict_outputs(patches, batch_size=batch_size)
        return outs[OUTPUT_NAME], outs.get(FAMILIARITY_NAME)

    def predict_outputs(self, patches: np.ndarray, *, batch_size: int = 8) -> dict[str, np.ndarray]:
        """Every output of the model by name, for uint8 patches (N, S, S, 3), in input order:
        ``probabilities``, and ``familiarity`` (contract 2 on) and ``reached`` (cascades,
        contract 3) when the model has them.

        Raises:
            ScreenerError: patches of the wrong shape or type, or outputs that are not what
                the contract says (probabilities not finite, outside [0, 1] or not summing
                to 1; a row count or column count unlike the input's and the class set's).
        """
        patches = np.asarray(patches)
        s = self.patch_px
        if patches.dtype != np.uint8 or patches.ndim != 4 or patches.shape[1:] != (s, s, 3):
            raise ScreenerError(
                f"expected uint8 patches of shape (n, {s}, {s}, 3), got {patches.dtype} {patches.shape}"
            )
        return self._run(len(patches), lambda a, b: patches[a:b], batch_size)

    def _run(
        self, n: int, take: Callable[[int, int], np.ndarray], batch_size: int = 8
    ) -> dict[str, np.ndarray]:
        """Run ``take(a, b)`` (patches a to b) through the model in batches, in input order.

        Batches are cut only as workers become free (at most two per worker waiting), so
        patches never pile up in memory ahead of the model.
        """
        if getattr(self, "_closed", False):
            raise ScreenerError("this Screener was closed; create a new one")
        # A predict called from one of the workers runs its batches in that worker.
        pool = None if getattr(_local, "worker", False) else self._pool
        if pool is not None:  # small inputs still use every core: at most ceil(n / workers)
            batch_size = max(1, min(batch_size, -(-n // self.workers)))
        spans = [(i, min(n, i + batch_size)) for i in range(0, n, batch_size)]

        def run(span: tuple[int, int]) -> list[np.ndarray]:
            chunk = take(*span)
            return self._checked(self._session.run(self._outputs, {INPUT_NAME: chunk}), len(chunk))

        if pool is not None and len(spans) > 1:
            outs: list[list[np.ndarray]] = []
            waiting: deque[Future[list[np.ndarray]]] = deque()
            for span in spans:
                waiting.append(pool.submit(run, span))
                if len(waiting) >= 2 * self.workers:
                    outs.append(waiting.popleft().result())
            outs.extend(f.result() for f in waiting)
        else:
            outs = [run(span) for span in spans]
        empty = {
            OUTPUT_NAME: np.zeros((0, len(self.class_names)), dtype=np.float32),
            FAMILIARITY_NAME: np.zeros(0, np.float32),
            REACHED_NAME: np.zeros(0, bool),
        }
        return {
            name: np.concatenate([empty[name], *(o[i] for o in outs)])
            for i, name in enumerate(self._outputs)
        }

    def _checked(self, outs: list[np.ndarray], n: int) -> list[np.ndarray]:
        """The outputs of one batch of ``n`` patches, refused unless they follow the contract."""
        probs = np.asarray(outs[0])
        c = len(self.class_names)
        if probs.shape != (n, c):
            raise ScreenerError(
                f"{self.path.name} gave {OUTPUT_NAME} of shape {probs.shape} for {n} patches; "
                f"the contract says ({n}, {c}), one column per class"
            )
        bad = None
        if not np.all(np.isfinite(probs)):
            bad = f"non-finite values (NaN or infinity) for {int((~np.isfinite(probs)).any(1).sum())} of {n} patches"
        elif probs.min() < -1e-4 or probs.max() > 1 + 1e-4:
            bad = f"values outside [0, 1] (from {probs.min():.4g} to {probs.max():.4g})"
        else:
            sums = probs.sum(axis=1, dtype=np.float64)
            worst = float(np.abs(sums - 1).max()) if n else 0.0
            if worst > PROBABILITY_SUM_TOLERANCE:
                bad = f"rows that do not sum to 1 (off by up to {worst:.3g})"
        if bad:
            raise ScreenerError(
                f"{self.path.name} gave {OUTPUT_NAME} with {bad}: the model is broken, not "
                "this frame; export it again"
            )
        for name, out in zip(self._outputs[1:], outs[1:], strict=True):
            if np.asarray(out).shape != (n,):
                raise ScreenerError(
                    f"{self.path.name} gave {name} of shape {np.asarray(out).shape} for {n} "
                    f"patches; the contract says ({n},)"
                )
        return outs

    def cut(
        self,
        rgb: np.ndarray,
        stride: int | None = None,
        gsd_mm: float | None = None,
        *,
        full_size: tuple[int, int] | None = None,
    ) -> FramePatches:
        """Resample (when scales are known) and cut a frame into model patches, without inference.

        Args:
            rgb: the frame, (H, W, 3) uint8.
            stride: step between cells in model pixels (default: the patch size).
            gsd_mm: the full-size frame's scale in mm per pixel.
            full_size: (height, width) of the full-size frame when ``rgb`` was decoded at
                reduced size; boxes, height and width are then reported in full-size pixels.
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
        full_h, full_w = (h, w) if full_size is None else (int(full_size[0]), int(full_size[1]))
        if full_w < w or full_h < h:
            raise ScreenerError(f"full_size {full_size} is smaller than the frame given ({h}, {w})")
        pixel_scale = full_w / w  # full-size pixels per pixel of rgb
        factor = 1.0 / pixel_scale  # model pixels per full-size frame pixel
        work = rgb
        if gsd_mm is not None:
            try:
                scale = float(gsd_mm)
            except (TypeError, ValueError):
                scale = math.nan
            if not (math.isfinite(scale) and scale > 0):
                raise ScreenerError(f"gsd_mm must be a finite number above 0, got {gsd_mm}")
            gsd_mm = scale
            if self.patch_mm:
                # model pixels per pixel of rgb, whose own scale is gsd_mm * pixel_scale
                step = s / (self.patch_mm / (gsd_mm * pixel_scale))
                factor = step / pixel_scale
                if abs(step - 1.0) > 1e-3:
                    nw, nh = max(1, round(w * step)), max(1, round(h * step))
                    if nw * nh > MAX_RESAMPLED_PIXELS:
                        raise ScreenerError(
                            f"a scale of {gsd_mm:g} mm/px with the model's patch of "
                            f"{self.patch_mm:g} mm would resample this frame to {nw} x {nh} "
                            f"pixels, above the limit of {MAX_RESAMPLED_PIXELS}: check --gsd-mm"
                        )
                    work = _resample(rgb, nw, nh)
        wh, ww = work.shape[:2]
        ys, xs = axis_starts(wh, s, stride), axis_starts(ww, s, stride)
        boxes = np.empty((len(ys), len(xs), 4), dtype=np.int64)
        for r, y0 in enumerate(ys):
            for c, x0 in enumerate(xs):
                x1, y1 = min(x0 + s, ww), min(y0 + s, wh)
                boxes[r, c] = [
                    int(round(x0 / factor)),
                    int(round(y0 / factor)),
                    min(full_w, int(round(x1 / factor))),
                    min(full_h, int(round(y1 / factor))),
                ]
        return FramePatches(
            boxes=boxes,
            height=full_h,
            width=full_w,
            gsd_mm=gsd_mm,
            source=work,
            starts=(ys, xs),
            size=s,
        )

    def crack_map_from_patches(self, fp: FramePatches) -> CrackMap:
        """Run the model on a cut frame (see :meth:`cut`) and build its crack map."""
        rows, cols = fp.boxes.shape[:2]
        outs = self._run(len(fp), fp.batch)
        probs, fam = outs[OUTPUT_NAME].reshape(rows, cols, -1), outs.get(FAMILIARITY_NAME)
        reached = outs.get(REACHED_NAME)
        screen = screening_probability(probs)
        warnings = []
        familiarity = None if fam is None else fam.reshape(rows, cols).astype(np.float32)
        unfamiliar = None
        if familiarity is not None:
            limit = float(cast(dict, self.info.familiarity)["threshold"])  # it has the output
            score, unfamiliar = frame_score(familiarity, limit)
            if not math.isfinite(score):  # cannot be vouched for: never silently familiar
                unfamiliar = True
                warnings.append(
                    "the familiarity of this frame could not be computed (the model gave "
                    "non-finite values): treat it as unlike the training data; check this job "
                    "with `trainkit sample` and `trainkit verify`"
                )
            elif unfamiliar:
                warnings.append(
                    f"this frame looks unlike the model's training data (familiarity score "
                    f"{score:.1f} above {limit:.1f}): its recall figures do not apply here; "
                    "check this job with `trainkit sample` and `trainkit verify`"
                )
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
            familiarity=familiarity,
            unfamiliar=unfamiliar,
            reached=None if reached is None else reached.reshape(rows, cols).astype(bool),
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
