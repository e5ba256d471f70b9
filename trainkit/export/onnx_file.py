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
import dataclasses
import io
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from trainkit.core.caution import CASCADE_WARNING_CAVEAT
from trainkit.core.contract import (
    CASCADE_VERSION,
    CONTRACT_VERSION,
    FAMILIARITY_NAME,
    FORMAT_KEY,
    INPUT_NAME,
    OUTPUT_NAME,
    ModelInfo,
    encode_metadata,
)
from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.core.fsutil import atomic_path
from trainkit.export.cascade_graph import all_nodes, cascade_plan

__all__ = ["export_experiment", "ExportError", "DEFAULT_OPSET", "PARITY_ATOL", "read_metadata"]

DEFAULT_OPSET = 18
#: Largest allowed absolute difference of probabilities between PyTorch and ONNX Runtime.
PARITY_ATOL = 1e-4


class ExportError(TrainkitError):
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


def network_to_onnx(network, input_px: int, *, opset: int = DEFAULT_OPSET):
    """The graph of a trained network (Preprocess + backbone) with softmax, as an ONNX ModelProto.

    Input ``image``: uint8 (N, S, S, 3) with a dynamic batch; output ``probabilities``, and
    ``familiarity`` too when ``network`` is a
    :class:`~trainkit.export.familiarity_graph.ScreenerGraph` (which applies its own
    softmax). The exporter's progress lines are kept off the console. No metadata is set here.
    """
    import torch

    from trainkit.export.familiarity_graph import ScreenerGraph

    two = isinstance(network, ScreenerGraph)
    module = network.eval() if two else _wrapper(network)
    names = [OUTPUT_NAME, FAMILIARITY_NAME] if two else [OUTPUT_NAME]

    dummy = torch.zeros((2, input_px, input_px, 3), dtype=torch.uint8)
    batch = torch.export.Dim("batch", min=1, max=4096)
    log = io.StringIO()
    with contextlib.redirect_stdout(log), contextlib.redirect_stderr(log):
        program = torch.onnx.export(
            module,
            (dummy,),
            dynamo=True,
            opset_version=opset,
            input_names=[INPUT_NAME],
            output_names=names,
            dynamic_shapes=({0: batch},),
            optimize=True,
            verbose=False,
        )
    return program.model_proto


def _sample_patches(ckpt: dict, input_px: int, n: int = 32) -> np.ndarray:
    """Real patches for the parity check: the workspace's test (else any) crops; noise if none."""
    from trainkit.store.workspace import Workspace, WorkspaceError

    try:
        ws = Workspace.open(ckpt["experiment"]["workspace"])
        from trainkit.core.taxonomy import class_set_from_dict
        from trainkit.learning.data import load_patch_set

        cs = class_set_from_dict(ckpt["class_set"])
        for subset in ("test", "val", "train"):
            ps = load_patch_set(ws, subset, cs, input_px=input_px)
            if len(ps):
                return ps.images[:n]
    except (WorkspaceError, KeyError, OSError):
        pass
    rng = np.random.default_rng(0)
    return rng.integers(0, 256, size=(8, input_px, input_px, 3), dtype=np.uint8)


@dataclass(frozen=True)
class _Plan:
    """What :func:`export_experiment` writes: the cascade (``cascade``, the plan of
    :func:`~trainkit.export.cascade_graph.cascade_plan`) or, when it is None, the main
    network alone; ``note`` says why the cascade was left out (None when nothing to say)."""

    cascade: dict | None
    note: str | None


@dataclass(frozen=True)
class _Written:
    """One checked ONNX file: its metadata, the familiarity record it carries and the
    figures of its checks."""

    meta: dict[str, str]
    familiarity: dict | None
    max_diff: float
    familiarity_diff: float | None
    batchnorm_left: list[str]
    parity_patches: int
    #: Why the familiarity output was left out (None when it was not).
    familiarity_skipped: str | None = None


def export_experiment(
    exp_dir: str | Path,
    *,
    opset: int = DEFAULT_OPSET,
    out: str | Path | None = None,
    cascade: bool = False,
) -> dict:
    """Export ``EXP/checkpoint.pt`` to ``EXP/model.onnx`` (or ``out``); returns a summary.

    With ``cascade=True`` and a first stage in the checkpoint whose evaluation passed the
    cascade gate, the file is the one-graph cascade (contract 3); otherwise the main network
    alone. Opt-in because of :data:`~trainkit.core.caution.CASCADE_WARNING_CAVEAT`.

    Raises:
        ExportError: the checker or the parity check failed.
    """
    from trainkit import __version__
    from trainkit.core.fsutil import atomic_write_json
    from trainkit.judging.model_card import write_model_card
    from trainkit.learning.network import load_checkpoint

    folder = Experiment(exp_dir)
    folder.migrate()
    model, ckpt, class_set = load_checkpoint(folder.path)
    input_px = int(ckpt["input_px"])
    target = Path(out) if out else folder.model_path
    metrics = folder.read_metrics()
    info = _model_info(ckpt, class_set, input_px, metrics, __version__)

    # 1) The cascade, when asked for and allowed; when its familiarity does not reproduce
    # in ONNX nothing is written and the plan says why.
    plan = _plan(cascade, ckpt, metrics, class_set, input_px)
    written = None
    if plan.cascade is not None:
        try:
            written = _write_checked(
                model, plan.cascade["familiarity"], info, ckpt, target, opset, cascade=plan.cascade
            )
        except _FamiliarityMismatch as exc:
            plan = _Plan(None, f"{exc}; exported without the cascade")
    # 2) Otherwise the main network alone.
    if written is None:
        written = _write_main(model, info, ckpt, class_set, target, opset)

    summary = _summary(target, opset, plan, written, ckpt, metrics)
    summary["model_card"] = str(write_model_card(folder.path, ckpt, summary))
    if target == folder.model_path:  # the folder's own model: its record stays beside it
        atomic_write_json(folder.export_path, summary)
    return summary


def _plan(asked: bool, ckpt: dict, metrics: dict | None, class_set, input_px: int) -> _Plan:
    """The cascade's plan when ``asked`` (cascade_plan says whether it may be written);
    otherwise no cascade, with a note when the checkpoint has a first stage."""
    if asked:

        def fit(network, head):
            return _graph_with_familiarity(network, head, ckpt, class_set, input_px)

        return _Plan(*cascade_plan(ckpt, metrics, class_set, input_px, fit))
    if not ckpt.get("cascade"):
        return _Plan(None, None)
    return _Plan(
        None,
        "exported without the cascade (`trainkit export --cascade` writes it): "
        f"{CASCADE_WARNING_CAVEAT}",
    )


def _write_main(model, info, ckpt: dict, class_set, target: Path, opset: int) -> _Written:
    """Write the main network with its familiarity output; without it (contract 1) when the
    familiarity does not reproduce in ONNX: the add-on must not cost the screener itself."""
    from trainkit.learning.steps import head_module_name, stage_module_names

    backbone = ckpt["config"]["backbone"]
    graph, familiarity = _graph_with_familiarity(
        model,
        head_module_name(backbone),
        ckpt,
        class_set,
        info.patch_px,
        stage_module_names(backbone) or None,
    )
    try:
        return _write_checked(graph, familiarity, info, ckpt, target, opset)
    except _FamiliarityMismatch as exc:
        written = _write_checked(model, None, info, ckpt, target, opset)
        skipped = f"{exc}; exported without the familiarity output (contract 1)"
        return dataclasses.replace(written, familiarity_skipped=skipped)


def _summary(
    target: Path, opset: int, plan: _Plan, written: _Written, ckpt: dict, metrics: dict | None
) -> dict:
    """The summary :func:`export_experiment` returns and writes to ``export.json``."""
    return {
        "model": str(target),
        "opset": opset,
        "bytes": target.stat().st_size,
        "parity_max_abs_diff": written.max_diff,
        "parity_patches": written.parity_patches,
        "familiarity_max_rel_diff": written.familiarity_diff,
        "familiarity": written.familiarity,
        "familiarity_skipped": written.familiarity_skipped,
        "cascade": None if plan.cascade is None else plan.cascade["meta"],
        "cascade_skipped": plan.note,
        "contract": written.meta[FORMAT_KEY],
        "batchnorm_nodes": len(written.batchnorm_left),
        "exporter": f"torch.onnx.export(dynamo=True), opset {opset}",
        "threshold": json.loads(written.meta["threshold"]),
        "weights": weights_record(ckpt),
        "evaluated": metrics is not None,
    }


def _model_info(ckpt: dict, class_set, input_px: int, metrics: dict | None, version: str):
    """The contract fields every export shares (familiarity and version are set per graph)."""
    experiment = ckpt["experiment"]
    pmm = experiment.get("patch_mm_range")
    return ModelInfo(
        class_names=list(class_set.names),
        angle_centres=list(class_set.angle_centres),
        patch_px=input_px,
        patch_mm=None if not pmm else round(float(np.mean(pmm)), 3),
        threshold=metrics["screening"]["threshold"] if metrics else 0.5,
        threshold_source=metrics["screening"]["threshold_source"]
        if metrics
        else "default 0.5 (not evaluated)",
        gsd_mm_range=experiment.get("gsd_mm_range"),
        patch_mm_range=pmm,
        kit_version=version,
        data_digest=str(experiment.get("data_digest")),
        test_metrics=_headline(metrics),
        weights=weights_record(ckpt),
        preprocess=preprocess_record(ckpt),
    )


def _write_checked(
    graph,
    familiarity: dict | None,
    info,
    ckpt: dict,
    target: Path,
    opset: int,
    *,
    cascade: dict | None = None,
) -> _Written:
    """Export ``graph``, set its metadata, check it (checker, folded BatchNorm, parity with
    PyTorch) and only then put it at ``target``; returns what was written.

    With ``cascade`` (the plan of :func:`~trainkit.export.cascade_graph.cascade_plan`) ``graph`` is the main network and the file
    is the one-graph cascade of :mod:`trainkit.export.cascade_graph` (contract 3)."""
    import onnx

    from trainkit import __version__

    version = CONTRACT_VERSION if familiarity else "trainkit-screener-1"
    info = dataclasses.replace(
        info,
        familiarity=familiarity,
        cascade=cascade["meta"] if cascade else None,
        version=CASCADE_VERSION if cascade else version,
        test_metrics=cascade["headline"] if cascade else info.test_metrics,
    )
    if cascade:
        from trainkit.export.cascade_graph import cascade_to_onnx

        px, threshold = info.patch_px, cascade["meta"]["pass_threshold"]
        first = network_to_onnx(cascade["stage1"], px, opset=opset)
        main_proto = network_to_onnx(graph, px, opset=opset)
        proto = cascade_to_onnx(first, main_proto, px, threshold)
    else:
        proto = network_to_onnx(graph, info.patch_px, opset=opset)
    meta = encode_metadata(info)
    onnx.helper.set_model_props(proto, meta)
    proto.producer_name = "trainkit"
    proto.producer_version = __version__
    with atomic_path(target) as tmp:
        onnx.save(proto, tmp)
        onnx.checker.check_model(str(tmp), full_check=True)
        left = [n.name for n in all_nodes(proto.graph) if n.op_type == "BatchNormalization"]
        if left:
            raise ExportError(
                f"{len(left)} BatchNormalization nodes were not folded into convolutions: {left[:3]}"
            )
        # Parity against PyTorch on real patches.
        images = _sample_patches(ckpt, info.patch_px)
        if cascade:
            max_diff, fam_diff = _cascade_parity(graph, cascade, tmp, images, main_proto)
        else:
            max_diff, fam_diff = _check_parity(graph, tmp, images, two=familiarity is not None)
    return _Written(meta, familiarity, max_diff, fam_diff, left, int(len(images)))


class _FamiliarityMismatch(ExportError):
    """The familiarity output of the ONNX graph does not reproduce PyTorch's."""


def _cascade_parity(main, cascade: dict, path: Path, images: np.ndarray, main_proto):
    from trainkit.export.cascade_graph import check_cascade_parity

    try:
        return check_cascade_parity(main, cascade, path, images, PARITY_ATOL, main_proto)
    except ValueError as exc:
        if str(exc).startswith("familiarity"):
            raise _FamiliarityMismatch(f"{exc}; model not written") from None
        raise ExportError(str(exc)) from None


def _check_parity(
    graph, path: Path, images: np.ndarray, *, two: bool
) -> tuple[float, float | None]:
    """Compare ONNX Runtime with PyTorch on ``images``; returns (max |dp|, familiarity's
    max relative difference or None).

    Raises:
        ExportError: probabilities differ by more than :data:`PARITY_ATOL`, the argmax
            differs, or the familiarity differs by more than 1e-3 relative.
    """
    import onnxruntime as ort
    import torch

    with torch.no_grad():
        ref = graph(torch.from_numpy(images)) if two else _wrapper(graph)(torch.from_numpy(images))
    ref_p, ref_f = (ref[0].numpy(), ref[1].numpy()) if two else (ref.numpy(), None)
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    got = sess.run(None, {INPUT_NAME: images})
    max_diff = float(np.max(np.abs(ref_p - got[0])))
    same_argmax = bool(np.array_equal(ref_p.argmax(1), got[0].argmax(1)))
    if max_diff > PARITY_ATOL or not same_argmax:
        raise ExportError(
            f"ONNX output differs from PyTorch on {len(images)} patches: max |dp| = {max_diff:.2e} "
            f"(allowed {PARITY_ATOL:.0e}), identical argmax: {same_argmax}; model not written"
        )
    if ref_f is None:
        return max_diff, None
    rel = float(np.max(np.abs(ref_f - got[1]) / np.maximum(np.abs(ref_f), 1.0)))
    if rel > 1e-3:
        raise _FamiliarityMismatch(
            f"ONNX familiarity differs from PyTorch by {rel:.2e} (relative, allowed 1e-3) on "
            f"{len(images)} patches; model not written"
        )
    return max_diff, rel


def _graph_with_familiarity(
    model, head: str, ckpt: dict, class_set, input_px: int, stages: list[str] | None = None
):
    """The network with its familiarity output (contract 2) when the experiment's workspace
    has training and validation patches; else the plain network and None (contract 1).

    ``head`` is the dotted name of ``model``'s classification head (the main network's, or
    the cascade's first stage, whose familiarity then covers every cell); ``stages`` names its
    stage ends for the feature ensemble (None: found by the generic rule of fit_graph)."""
    from trainkit.export.familiarity_graph import fit_graph
    from trainkit.learning.adapt import load_subset
    from trainkit.learning.data import load_patch_set
    from trainkit.store.workspace import Workspace, WorkspaceError

    try:
        ws = Workspace.open(ckpt["experiment"]["workspace"])
        # An adapted model's job training cells count (their surface is now familiar); the
        # frame threshold stays calibrated on whole validation photos, not on a job's
        # scattered sampled cells.
        train = load_subset(ws, "train", class_set, ckpt["experiment"], input_px=input_px)
        val = load_patch_set(ws, "val", class_set, input_px=input_px)
    except (WorkspaceError, KeyError, OSError):
        return model, None
    if len(train) < 2 or len(val) == 0:
        return model, None
    return fit_graph(
        model,
        head,
        train.images,
        train.labels,
        val.images,
        val_photos=val.photos,
        stages=stages,
    )


def weights_record(ckpt: dict) -> dict:
    """Which weights the model started from: ``{"name", "source", "sha256"}`` or random initialisation.

    Checkpoints from before the record existed say what their recipe asked for.
    """
    if isinstance(ckpt.get("weights"), dict):
        return ckpt["weights"]
    asked = ckpt["config"].get("weights")
    if asked is None:
        return {"name": "random initialisation"}
    return {"name": f"not recorded (the recipe asked for weights: {asked})"}


def preprocess_record(ckpt: dict) -> dict:
    """The normalisation inside the graph: float = (uint8 / 255 - mean) / std per RGB channel."""
    from trainkit.learning.models import backbone_record

    record = backbone_record(ckpt["config"]["backbone"])
    return {"input": "uint8 RGB", "mean": list(record.mean), "std": list(record.std)}


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
