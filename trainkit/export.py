"""Export a trained checkpoint to ONNX with preprocessing and metadata inside, and check parity.

Exporter path: ``torch.onnx.export(..., dynamo=True)`` (the torch.export-based
exporter, which needs onnxscript) at opset 18 by default. The graph takes
``image``: uint8 (N, S, S, 3) RGB with a dynamic batch and returns
``probabilities``: float32 (N, C), softmax over the class set. Every export is
checked with ``onnx.checker`` (full check) and against the PyTorch model on real
patches; a failed check leaves no model file behind.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
from pathlib import Path

import numpy as np

__all__ = ["export_experiment", "ExportError", "DEFAULT_OPSET", "PARITY_ATOL", "read_metadata"]

DEFAULT_OPSET = 18
#: Largest allowed absolute difference of probabilities between PyTorch and ONNX Runtime.
PARITY_ATOL = 1e-4


class ExportError(ValueError):
    """The export failed a check; the message gives the figures."""


def _wrapper(model):
    import torch
    from torch import nn

    class WithSoftmax(nn.Module):
        def __init__(self, net: nn.Module) -> None:
            super().__init__()
            self.net = net

        def forward(self, image: torch.Tensor) -> torch.Tensor:
            return torch.softmax(self.net(image), dim=1)

    return WithSoftmax(model).eval()


def _sample_patches(ckpt: dict, input_px: int, n: int = 32) -> np.ndarray:
    """Real patches for the parity check: the workspace's test (else any) crops; noise if none."""
    from .workspace import Workspace, WorkspaceError

    try:
        ws = Workspace.open(ckpt["experiment"]["workspace"])
        from .data import load_patch_set
        from .taxonomy import class_set_from_dict

        cs = class_set_from_dict(ckpt["class_set"])
        for subset in ("test", "val", "train"):
            ps = load_patch_set(ws, subset, cs, input_px=input_px)
            if len(ps):
                return ps.images[:n]
    except (WorkspaceError, KeyError, OSError):
        pass
    rng = np.random.default_rng(0)
    return rng.integers(0, 256, size=(8, input_px, input_px, 3), dtype=np.uint8)


def export_experiment(
    exp_dir: str | Path, *, opset: int = DEFAULT_OPSET, out: str | Path | None = None
) -> dict:
    """Export ``EXP/checkpoint.pt`` to ``EXP/model.onnx`` (or ``out``); returns a summary.

    Raises:
        ExportError: the checker or the parity check failed.
    """
    import onnx
    import onnxruntime as ort
    import torch

    from . import __version__
    from .training import load_checkpoint

    exp = Path(exp_dir)
    model, ckpt, class_set = load_checkpoint(exp)
    input_px = int(ckpt["input_px"])
    wrapped = _wrapper(model)
    dummy = torch.zeros((2, input_px, input_px, 3), dtype=torch.uint8)
    target = Path(out) if out else exp / "model.onnx"
    tmp = target.with_suffix(".onnx.tmp")
    batch = torch.export.Dim("batch", min=1, max=4096)
    log = io.StringIO()
    with contextlib.redirect_stdout(log), contextlib.redirect_stderr(log):
        program = torch.onnx.export(
            wrapped,
            (dummy,),
            dynamo=True,
            opset_version=opset,
            input_names=["image"],
            output_names=["probabilities"],
            dynamic_shapes=({0: batch},),
            optimize=True,
            verbose=False,
        )
    proto = program.model_proto
    metrics_path = exp / "evaluation" / "metrics.json"
    metrics = json.loads(metrics_path.read_text()) if metrics_path.exists() else None
    experiment = ckpt["experiment"]
    pmm = experiment.get("patch_mm_range")
    meta = {
        "trainkit.format": "trainkit-screener-1",
        "class_names": json.dumps(list(class_set.names)),
        "angle_centres": json.dumps(list(class_set.angle_centres)),
        "patch_px": str(input_px),
        "patch_mm": json.dumps(None if not pmm else round(float(np.mean(pmm)), 3)),
        "threshold": json.dumps(metrics["screening"]["threshold"] if metrics else 0.5),
        "threshold_source": metrics["screening"]["threshold_source"]
        if metrics
        else "default 0.5 (not evaluated)",
        "gsd_mm_range": json.dumps(experiment.get("gsd_mm_range")),
        "patch_mm_range": json.dumps(pmm),
        "kit_version": __version__,
        "data_digest": str(experiment.get("data_digest")),
        "test_metrics": json.dumps(_headline(metrics)),
        "input": "image: uint8 (N, S, S, 3) RGB, S = patch_px; resize is the caller's job",
        "output": "probabilities: float32 (N, C) softmax; screening probability = 1 - p[none]",
    }
    onnx.helper.set_model_props(proto, meta)
    proto.producer_name = "trainkit"
    proto.producer_version = __version__
    onnx.save(proto, tmp)
    try:
        onnx.checker.check_model(str(tmp), full_check=True)
        # Parity against PyTorch on real patches.
        images = _sample_patches(ckpt, input_px)
        with torch.no_grad():
            ref = wrapped(torch.from_numpy(images)).numpy()
        sess = ort.InferenceSession(str(tmp), providers=["CPUExecutionProvider"])
        got = sess.run(["probabilities"], {"image": images})[0]
        max_diff = float(np.max(np.abs(ref - got)))
        same_argmax = bool(np.array_equal(ref.argmax(1), got.argmax(1)))
        if max_diff > PARITY_ATOL or not same_argmax:
            raise ExportError(
                f"ONNX output differs from PyTorch on {len(images)} patches: max |dp| = {max_diff:.2e} "
                f"(allowed {PARITY_ATOL:.0e}), identical argmax: {same_argmax}; model not written"
            )
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    os.replace(tmp, target)
    return {
        "model": str(target),
        "opset": opset,
        "bytes": target.stat().st_size,
        "parity_max_abs_diff": max_diff,
        "parity_patches": int(len(images)),
        "threshold": json.loads(meta["threshold"]),
        "evaluated": metrics is not None,
    }


def _headline(metrics: dict | None) -> dict | None:
    if not metrics:
        return None
    s = metrics["screening"]
    return {
        "split": metrics["split"],
        "patches": metrics["patches"],
        "screening_recall": s["recall"],
        "screening_recall_interval": [s["recall_interval"]["low"], s["recall_interval"]["high"]],
        "interval_method": s["recall_interval"]["method"],
        "false_alarm_rate": s["false_alarm_rate"],
        "accuracy": metrics["accuracy"],
    }


def read_metadata(path: str | Path) -> dict[str, str]:
    """The metadata_props of an ONNX file as a dict of strings."""
    import onnx

    model = onnx.load(str(path), load_external_data=False)
    return {p.key: p.value for p in model.metadata_props}
