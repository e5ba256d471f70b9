"""int8 where it pays: quantize an exported float model and keep it only when faster with recall held.

Static QDQ quantization with ONNX Runtime's tools (per-tensor and per-channel candidates),
calibrated on training patches; each candidate's test recall and speed are measured side by
side with the float model on the exporting machine, and ``model-int8.onnx`` is written
only when one is faster by at least INT8_MIN_SPEEDUP and loses at most
INT8_MAX_RECALL_DROP of recall.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from trainkit.core.contract import INPUT_NAME, OUTPUT_NAME, screening_probability
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path
from trainkit.export.onnx_file import ExportError, read_metadata

__all__ = ["quantize_experiment", "INT8_MAX_RECALL_DROP", "INT8_MIN_SPEEDUP"]


#: Largest allowed drop in test crack recall for an int8 model to be accepted.
INT8_MAX_RECALL_DROP = 0.01
#: The int8 model must be at least this much faster (throughput ratio) to be accepted.
INT8_MIN_SPEEDUP = 1.05
#: Why a cascade is not quantized.
INT8_CASCADE_SKIP = (
    "int8 skipped: model.onnx is a two-stage cascade, whose main network runs inside an If "
    "branch on the cells the first stage passes; static calibration and the side-by-side timing "
    "here were built for one network on every patch and have not been checked on that graph, "
    "so the float cascade is kept (export a model without a cascade to try int8)"
)


def _time_session(sess, images: np.ndarray, rounds: int = 5) -> float:
    """Median seconds to run all images in batches of 64."""
    import statistics
    import time

    times = []
    for _ in range(rounds):
        t0 = time.perf_counter()
        for i in range(0, len(images), 64):
            sess.run([OUTPUT_NAME], {INPUT_NAME: images[i : i + 64]})
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _speedup(base, sess, images: np.ndarray) -> float:
    """Float time / int8 time, timing the two alternately on the same patches (median of 3)."""
    t_int8, t_fp32 = [], []
    for _ in range(3):
        t_int8.append(_time_session(sess, images, rounds=1))
        t_fp32.append(_time_session(base, images, rounds=1))
    return round(float(np.median(t_fp32) / np.median(t_int8)), 3)


def quantize_experiment(exp_dir: str | Path, *, calibration_patches: int = 128) -> dict:
    """Make ``EXP/model-int8.onnx`` by static QDQ quantization, if it keeps recall and is faster.

    Steps: ONNX Runtime's quantization pre-processing (shape inference and graph
    optimisation) on ``EXP/model.onnx``; static quantization in QDQ form (uint8
    activations, int8 weights) calibrated on training patches, once per tensor and once
    per channel; each candidate is scored on the test patches (crack recall at the
    model's threshold) and timed against the float model side by side. The better
    candidate (higher recall, then faster) is kept only if recall drops by at most
    INT8_MAX_RECALL_DROP and it is at least INT8_MIN_SPEEDUP times faster.

    Raises:
        ExportError: no candidate passes; the message gives the figures.
    """
    import shutil
    import tempfile

    import onnx

    folder = Experiment(exp_dir)
    fp32 = folder.model_path
    if not fp32.is_file():
        raise ExportError(f"{fp32} does not exist; export the float model first")
    meta = read_metadata(fp32)
    if "cascade" in meta:
        raise ExportError(INT8_CASCADE_SKIP)
    train, test = _int8_patches(folder)
    threshold = float(json.loads(meta["threshold"]))
    rng = np.random.default_rng(0)
    calib = train.images[rng.permutation(len(train))[:calibration_patches]]
    work = Path(tempfile.mkdtemp(prefix=".int8-work-", dir=folder.path))
    try:
        base_recall, candidates = _int8_candidates(fp32, work, calib, test, threshold)
        best = max(candidates, key=lambda c: (c["recall"], c["speedup"]))
        figures = {
            "float_recall": round(base_recall, 4),
            "candidates": [
                {
                    k: (round(c[k], 4) if k == "recall" else c[k])
                    for k in ("per_channel", "recall", "speedup")
                }
                for c in candidates
            ],
            "test_patches": int(len(test)),
            "calibration_patches": int(len(calib)),
        }
        drop = base_recall - best["recall"]
        if drop > INT8_MAX_RECALL_DROP or best["speedup"] < INT8_MIN_SPEEDUP:
            raise ExportError(_int8_refusal(base_recall, candidates))
        model = onnx.load(str(best["path"]))
        props = dict(meta)
        props["quantization"] = json.dumps(
            {
                "format": "QDQ",
                "per_channel": best["per_channel"],
                "activations": "uint8",
                "weights": "int8",
                **figures,
            }  # fmt: skip
        )
        del model.metadata_props[:]
        onnx.helper.set_model_props(model, props)
        target = folder.int8_model_path
        with atomic_path(target) as tmp:
            onnx.save(model, str(tmp))
            onnx.checker.check_model(str(tmp), full_check=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return {
        "model": str(target),
        "per_channel": best["per_channel"],
        "recall": best["recall"],
        "speedup": best["speedup"],
        **figures,
    }


def _int8_patches(folder: Experiment):
    """(train, test) patch sets of the experiment's workspace, for calibration and the check."""
    from trainkit.core.taxonomy import class_set_from_dict
    from trainkit.learning.adapt import load_subset
    from trainkit.learning.data import load_patch_set
    from trainkit.learning.network import load_checkpoint
    from trainkit.store.workspace import Workspace

    _, ckpt, _ = load_checkpoint(folder.path)
    cs = class_set_from_dict(ckpt["class_set"])
    ws = Workspace.open(ckpt["experiment"]["workspace"])
    px = int(ckpt["input_px"])
    train = load_subset(ws, "train", cs, ckpt["experiment"], input_px=px)
    test = load_patch_set(ws, "test", cs, input_px=px)
    if len(train) == 0 or len(test) == 0 or not np.any(test.labels != 0):
        raise ExportError(
            "int8 needs training patches for calibration and test patches with cracks for the check"
        )
    return train, test


def _int8_candidates(fp32: Path, work: Path, calib: np.ndarray, test, threshold: float):
    """The float model's test recall, and per-tensor and per-channel int8 candidates with
    their recall and speed-up measured side by side."""
    import onnxruntime as ort
    from onnxruntime.quantization import (
        CalibrationDataReader,
        QuantFormat,
        QuantType,
        quantize_static,
    )
    from onnxruntime.quantization.shape_inference import quant_pre_process

    class Reader(CalibrationDataReader):
        def __init__(self) -> None:
            self.batches = iter([{INPUT_NAME: calib[i : i + 16]} for i in range(0, len(calib), 16)])

        def get_next(self):
            return next(self.batches, None)

    def recall(sess) -> float:
        probs = np.concatenate(
            [
                sess.run([OUTPUT_NAME], {INPUT_NAME: test.images[i : i + 64]})[0]
                for i in range(0, len(test), 64)
            ]  # fmt: skip
        )
        return float(np.mean(screening_probability(probs[test.labels != 0]) >= threshold))

    opts = ort.SessionOptions()
    base = ort.InferenceSession(str(fp32), opts, providers=["CPUExecutionProvider"])
    pre = work / "pre.onnx"
    quant_pre_process(str(fp32), str(pre), skip_symbolic_shape=True)
    candidates = []
    for per_channel in (False, True):
        out = work / f"int8-{'channel' if per_channel else 'tensor'}.onnx"
        quantize_static(
            str(pre), str(out), Reader(), quant_format=QuantFormat.QDQ, per_channel=per_channel,
            activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8,
        )  # fmt: skip
        sess = ort.InferenceSession(str(out), opts, providers=["CPUExecutionProvider"])
        candidates.append(
            {
                "per_channel": per_channel,
                "path": out,
                "recall": recall(sess),
                "speedup": _speedup(base, sess, test.images),
            }  # fmt: skip
        )
    return recall(base), candidates


def _int8_refusal(base_recall: float, candidates: list[dict]) -> str:
    return (
        f"int8 model refused: float crack recall {base_recall:.3f}; candidates "
        + "; ".join(
            f"{'per-channel' if c['per_channel'] else 'per-tensor'} recall {c['recall']:.3f}, "
            f"{c['speedup']:.2f}x speed"
            for c in candidates
        )
        + f" (needs a drop of at most {INT8_MAX_RECALL_DROP} and at least {INT8_MIN_SPEEDUP}x)"
    )
