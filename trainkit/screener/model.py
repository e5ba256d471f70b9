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
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

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


class ScreenerError(TrainkitError):
    """The model file or the input frame cannot be used; the message says why."""


_local = threading.local()


def _mark_worker() -> None:
    """Runs once in each Screener worker thread: predict() there must not wait on its own pool."""
    _local.worker = True


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
        contract 3) when the model has them."""
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

        def run(chunk: np.ndarray) -> list[np.ndarray]:
            return self._session.run(self._outputs, {INPUT_NAME: chunk})

        outs = list(
            self._pool.map(run, chunks) if parallel and len(chunks) > 1 else map(run, chunks)
        )
        empty = {
            OUTPUT_NAME: np.zeros((0, len(self.class_names)), dtype=np.float32),
            FAMILIARITY_NAME: np.zeros(0, np.float32),
            REACHED_NAME: np.zeros(0, bool),
        }
        return {
            name: np.concatenate([empty[name], *(o[i] for o in outs)])
            for i, name in enumerate(self._outputs)
        }

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
            if not gsd_mm > 0:
                raise ScreenerError(f"gsd_mm must be positive, got {gsd_mm}")
            if self.patch_mm:
                # model pixels per pixel of rgb, whose own scale is gsd_mm * pixel_scale
                step = s / (self.patch_mm / (gsd_mm * pixel_scale))
                factor = step / pixel_scale
                if abs(step - 1.0) > 1e-3:
                    from PIL import Image

                    nw, nh = max(1, round(w * step)), max(1, round(h * step))
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
                    min(full_w, int(round(x1 / factor))),
                    min(full_h, int(round(y1 / factor))),
                ]
        return FramePatches(
            patches=patches, boxes=boxes, height=full_h, width=full_w, gsd_mm=gsd_mm
        )

    def crack_map_from_patches(self, fp: FramePatches) -> CrackMap:
        """Run the model on a cut frame (see :meth:`cut`) and build its crack map."""
        rows, cols = fp.boxes.shape[:2]
        outs = self.predict_outputs(fp.patches)
        probs, fam = outs[OUTPUT_NAME].reshape(rows, cols, -1), outs.get(FAMILIARITY_NAME)
        reached = outs.get(REACHED_NAME)
        screen = screening_probability(probs)
        warnings = []
        familiarity = None if fam is None else fam.reshape(rows, cols).astype(np.float32)
        unfamiliar = None
        if familiarity is not None:
            limit = float(self.info.familiarity["threshold"])
            score, unfamiliar = frame_score(familiarity, limit)
            if unfamiliar:
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
