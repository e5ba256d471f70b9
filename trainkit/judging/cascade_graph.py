"""The two-stage cascade as one ONNX graph: a cheap first stage on every cell, the main network only on the cells it passes.

Why one graph: a downstream tool loads one file and gets the speed with one call.
Layout of the graph (contract ``trainkit-screener-3``, :mod:`trainkit.core.contract`):

1. the first stage (with its familiarity output, so every cell has one) runs on all N cells;
2. ``passed = 1 - P1(none) >= pass_threshold``; ``NonZero`` gives the K passed indices;
3. an ``If`` on ``K > 0``: its then-branch gathers the passed cells, runs the main network
   on them and scatters its probabilities (``ScatterND``) into an (N, C) tensor filled with
   the fixed clean vector (P(none) = 1); its else-branch returns that tensor as it is. The
   ``If`` keeps the main network away from an empty batch, whatever the operators do with
   one;
4. outputs ``probabilities`` (N, C), ``familiarity`` (N,) from the first stage and
   ``reached`` (N,) bool = ``passed``.

The two networks are exported separately with :func:`trainkit.judging.export.network_to_onnx`
and then joined with onnx.helper; :func:`run_cascade_torch` is the same computation in
PyTorch, for the export's parity check and the tests.
"""

from __future__ import annotations

import numpy as np

from trainkit.core.contract import FAMILIARITY_NAME, INPUT_NAME, OUTPUT_NAME, REACHED_NAME

__all__ = ["clean_vector", "cascade_to_onnx", "run_cascade_torch"]


def clean_vector(num_classes: int) -> np.ndarray:
    """The probabilities given to a cell the first stage does not pass: P(none) = 1."""
    v = np.zeros(num_classes, dtype=np.float32)
    v[0] = 1.0
    return v


def run_cascade_torch(stage1, main, images: np.ndarray, pass_threshold: float, batch: int = 64):
    """The cascade in PyTorch: (probabilities (N, C), familiarity (N,), reached (N,) bool).

    Args:
        stage1: uint8 patches -> (softmax (N, 2), familiarity (N,)), e.g. a
            :class:`~trainkit.judging.familiarity_graph.ScreenerGraph`.
        main: uint8 patches -> logits (N, C) (Preprocess + backbone).
        images: uint8 (N, S, S, 3).
        pass_threshold: first-stage ``1 - P(none)`` at or above which the main network runs.
    """
    import torch

    if len(images) == 0:
        raise ValueError("run_cascade_torch needs at least one patch, got 0")
    probs, fams, reached = [], [], []
    with torch.no_grad():
        c = main(torch.from_numpy(np.ascontiguousarray(images[:1]))).shape[1]
        for i in range(0, len(images), batch):
            x = torch.from_numpy(np.ascontiguousarray(images[i : i + batch]))
            p1, fam = stage1(x)
            passed = (1.0 - p1[:, 0]) >= pass_threshold
            out = torch.from_numpy(np.tile(clean_vector(c), (len(x), 1)))
            if bool(passed.any()):
                out[passed] = torch.softmax(main(x[passed]), dim=1)
            probs.append(out.numpy())
            fams.append(fam.numpy())
            reached.append(passed.numpy())
    return np.concatenate(probs), np.concatenate(fams), np.concatenate(reached)


def _prefixed(proto, prefix: str):
    """A copy of ``proto`` with every name prefixed (nodes, values, initializers)."""
    import onnx.compose

    return onnx.compose.add_prefix(proto, prefix)


def cascade_to_onnx(stage1, main, patch_px: int, pass_threshold: float, *, opset: int):
    """The one-graph cascade as an ONNX ModelProto (no metadata set here).

    Args:
        stage1: the first stage with its familiarity output (a ``ScreenerGraph``).
        main: the main network (Preprocess + backbone, logits out).
        patch_px: the input size S of both.
        pass_threshold: in [0, 1].
        opset: the ONNX opset of both exports.

    Raises:
        ValueError: ``pass_threshold`` outside [0, 1].
    """
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    from trainkit.judging.export import network_to_onnx

    if not 0.0 <= float(pass_threshold) <= 1.0:
        raise ValueError(f"pass_threshold must be in [0, 1], got {pass_threshold}")
    one = _prefixed(network_to_onnx(stage1, patch_px, opset=opset), "s1/")
    two = _prefixed(network_to_onnx(main, patch_px, opset=opset), "s2/")
    num_classes = int(two.graph.output[0].type.tensor_type.shape.dim[1].dim_value)
    if num_classes < 2:
        raise ValueError(f"the main network's output has no fixed class count: {num_classes}")

    def const(name: str, value) -> onnx.TensorProto:
        return numpy_helper.from_array(np.asarray(value), name)

    inits = [
        const("c/zero_idx", np.int64(0)),
        const("c/one", np.float32(1.0)),
        const("c/threshold", np.float32(pass_threshold)),
        const("c/axis0", np.array([0], dtype=np.int64)),
        const("c/axis_last", np.array([-1], dtype=np.int64)),
        const("c/k_min", np.int64(0)),
        const("c/clean", clean_vector(num_classes).reshape(1, -1)),
        const("c/classes", np.array([num_classes], dtype=np.int64)),
    ]
    outer = [
        helper.make_node("Identity", [INPUT_NAME], ["s1/" + INPUT_NAME]),
        *one.graph.node,
        helper.make_node("Gather", ["s1/" + OUTPUT_NAME, "c/zero_idx"], ["c/p_none"], axis=1),
        helper.make_node("Sub", ["c/one", "c/p_none"], ["c/score"]),
        helper.make_node("GreaterOrEqual", ["c/score", "c/threshold"], [REACHED_NAME]),
        helper.make_node("NonZero", [REACHED_NAME], ["c/idx2"]),
        helper.make_node("Squeeze", ["c/idx2", "c/axis0"], ["c/idx"]),
        helper.make_node("Size", ["c/idx"], ["c/k"]),
        helper.make_node("Greater", ["c/k", "c/k_min"], ["c/any"]),
        helper.make_node("Shape", [INPUT_NAME], ["c/n"], start=0, end=1),
        helper.make_node("Concat", ["c/n", "c/classes"], ["c/out_shape"], axis=0),
        helper.make_node("Expand", ["c/clean", "c/out_shape"], ["c/base"]),
        helper.make_node("Identity", ["s1/" + FAMILIARITY_NAME], [FAMILIARITY_NAME]),
    ]
    # then-branch: the main network on the passed cells, scattered into the clean base
    then_nodes = [
        helper.make_node("Gather", [INPUT_NAME, "c/idx"], ["s2/" + INPUT_NAME], axis=0),
        *two.graph.node,
        helper.make_node("Unsqueeze", ["c/idx", "c/axis_last"], ["c/idx_col"]),
        helper.make_node("ScatterND", ["c/base", "c/idx_col", "s2/" + OUTPUT_NAME], ["c/then_out"]),
    ]
    out_info = helper.make_tensor_value_info("c/then_out", TensorProto.FLOAT, ["N", num_classes])
    # The main network's weights live inside the branch: as outer-scope values ONNX Runtime
    # does not treat them as constants there, and the branch ran 4x slower (measured).
    then_graph = helper.make_graph(
        then_nodes, "main_network", [], [out_info], initializer=list(two.graph.initializer)
    )
    else_info = helper.make_tensor_value_info("c/else_out", TensorProto.FLOAT, ["N", num_classes])
    else_graph = helper.make_graph(
        [helper.make_node("Identity", ["c/base"], ["c/else_out"])], "clean_only", [], [else_info]
    )
    outer.append(
        helper.make_node(
            "If", ["c/any"], [OUTPUT_NAME], then_branch=then_graph, else_branch=else_graph
        )
    )
    graph = helper.make_graph(
        outer,
        "trainkit_cascade",
        [
            helper.make_tensor_value_info(
                INPUT_NAME, TensorProto.UINT8, ["N", patch_px, patch_px, 3]
            )
        ],
        [
            helper.make_tensor_value_info(OUTPUT_NAME, TensorProto.FLOAT, ["N", num_classes]),
            helper.make_tensor_value_info(FAMILIARITY_NAME, TensorProto.FLOAT, ["N"]),
            helper.make_tensor_value_info(REACHED_NAME, TensorProto.BOOL, ["N"]),
        ],
        initializer=[*one.graph.initializer, *inits],
    )
    model = helper.make_model(graph, opset_imports=list(one.opset_import))
    model.ir_version = one.ir_version
    return model
