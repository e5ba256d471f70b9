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

The two networks are exported separately (``trainkit.export.onnx_file.network_to_onnx``) and
then joined here with onnx.helper; :func:`run_cascade_torch` is the same computation in
PyTorch, for the export's parity check and the tests.
"""

from __future__ import annotations

import numpy as np

from trainkit.core.contract import FAMILIARITY_NAME, INPUT_NAME, OUTPUT_NAME, REACHED_NAME

__all__ = [
    "clean_vector",
    "cascade_to_onnx",
    "run_cascade_torch",
    "all_nodes",
    "cascade_plan",
    "check_cascade_parity",
]


def clean_vector(num_classes: int) -> np.ndarray:
    """The probabilities given to a cell the first stage does not pass: P(none) = 1."""
    v = np.zeros(num_classes, dtype=np.float32)
    v[0] = 1.0
    return v


def run_cascade_torch(stage1, main, images: np.ndarray, pass_threshold: float, batch: int = 64):
    """The cascade in PyTorch: (probabilities (N, C), familiarity (N,), reached (N,) bool).

    Args:
        stage1: uint8 patches -> (softmax (N, 2), familiarity (N,)), e.g. a
            :class:`~trainkit.export.familiarity_graph.ScreenerGraph`.
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


def all_nodes(graph):
    """The nodes of an ONNX ``graph`` and of its subgraphs (an If's branches)."""
    for node in graph.node:
        yield node
        for attr in node.attribute:
            if attr.g.node:
                yield from all_nodes(attr.g)


def _prefixed(proto, prefix: str):
    """A copy of ``proto`` with every name prefixed (nodes, values, initializers)."""
    import onnx.compose

    return onnx.compose.add_prefix(proto, prefix)


def cascade_to_onnx(stage1, main, patch_px: int, pass_threshold: float):
    """The one-graph cascade as an ONNX ModelProto (no metadata set here).

    Args:
        stage1: the first stage's exported graph (ModelProto) with the outputs
            ``probabilities`` (N, 2) and ``familiarity`` (N,).
        main: the main network's exported graph (ModelProto), output ``probabilities``.
        patch_px: the input size S of both.
        pass_threshold: in [0, 1].

    Raises:
        ValueError: ``pass_threshold`` outside [0, 1].
    """
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    if not 0.0 <= float(pass_threshold) <= 1.0:
        raise ValueError(f"pass_threshold must be in [0, 1], got {pass_threshold}")
    one, two = _prefixed(stage1, "s1/"), _prefixed(main, "s2/")
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
    # does not treat them as constants there, and the branch ran several times slower
    # (benchmarks/results/lab_notes.md).
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


def cascade_plan(ckpt: dict, metrics: dict | None, class_set, input_px: int, fit):
    """What the export needs for a cascade, or (None, why there is none).

    A cascade is exported only when the checkpoint has a first stage, the evaluation chose its
    pass threshold and its gate passed, and the first stage's familiarity could be fitted
    (contract 3 gives every cell a familiarity).

    Args:
        ckpt: the checkpoint (its ``cascade`` record).
        metrics: ``evaluation/metrics.json`` or None.
        fit: ``fit(network, head_name) -> (graph, familiarity or None)``; the export's one
            call of :func:`trainkit.export.familiarity_graph.fit_graph`.

    Returns:
        (``{"stage1", "familiarity", "meta", "headline"}``, None) or (None, reason or None
        when the recipe asked for no cascade).
    """
    record = ckpt.get("cascade")
    if record is None:
        return None, None
    block = (metrics or {}).get("cascade")
    if not block:
        return None, "the cascade was not evaluated (run `trainkit evaluate`); exported without it"
    if not block["gate"]["passed"]:
        return None, block["gate"]["verdict"]
    from trainkit.learning.cascade import load_stage1, stage1_head_name
    from trainkit.learning.config import CascadeConfig

    first = load_stage1(record)
    graph, familiarity = fit(first, stage1_head_name(CascadeConfig(**record["config"])))
    if familiarity is None:
        return None, "no familiarity for the first stage (training or validation patches not found)"
    main, cas = block["main"], block["cascade"]
    meta = {
        "pass_threshold": round(float(block["pass_threshold"]), 6),
        "threshold_source": block["threshold_source"],
        "stage1": {k: record["config"][k] for k in ("backbone", "input_px")},
        "loss": record.get("loss"),
        "validation": block["validation"],
        "test": {
            "recall": cas["recall"],
            "false_alarm_rate": cas["false_alarm_rate"],
            "main_recall": main["recall"],
            "main_false_alarm_rate": main["false_alarm_rate"],
            "passed_share": block["passed_share"],
        },
    }
    headline = _cascade_headline(metrics, block)
    return {"stage1": graph, "familiarity": familiarity, "meta": meta, "headline": headline}, None


def _cascade_headline(metrics: dict, block: dict) -> dict:
    """The metadata's headline test figures: the cascade's (what the file does), the main
    network's beside them."""
    s, cas = metrics["screening"], block["cascade"]
    ci = cas["recall_interval"]
    return {
        "split": metrics["split"],
        "patches": metrics["patches"],
        "screening_recall": cas["recall"],
        "screening_recall_interval": [ci["low"], ci["high"]],
        "interval_method": ci["method"],
        "false_alarm_rate": cas["false_alarm_rate"],
        "accuracy": metrics["accuracy"],
        "figures_of": "the cascade (first stage, then the main network on the cells it passes)",
        "main_network": {
            "screening_recall": s["recall"],
            "false_alarm_rate": s["false_alarm_rate"],
        },
    }


def check_cascade_parity(main, cascade: dict, path, images: np.ndarray, atol: float, main_proto):
    """ONNX Runtime against :func:`run_cascade_torch` on ``images``; returns (max |dp|,
    familiarity's max relative difference). The main network's own graph (``main_proto``) is
    checked on every image too, since the cascade may pass few of them to it.

    Raises:
        ValueError: the cells reaching the main network differ, probabilities differ by more
            than ``atol`` or the familiarity by more than 1e-3 relative (the message says
            which; the export turns it into its own error).
    """
    import onnxruntime as ort
    import torch

    from trainkit.core.contract import INPUT_NAME

    with torch.no_grad():
        ref_main = torch.softmax(main(torch.from_numpy(images)), dim=1).numpy()
    alone = ort.InferenceSession(main_proto.SerializeToString(), providers=["CPUExecutionProvider"])
    diff = float(np.max(np.abs(alone.run(None, {INPUT_NAME: images})[0] - ref_main)))
    if diff > atol:
        raise ValueError(
            f"ONNX main network differs from PyTorch on {len(images)} patches: max |dp| = "
            f"{diff:.2e} (allowed {atol:.0e}); model not written"
        )
    t = cascade["meta"]["pass_threshold"]
    ref_p, ref_f, ref_r = run_cascade_torch(cascade["stage1"], main, images, t)
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    got_p, got_f, got_r = sess.run(None, {INPUT_NAME: images})
    if not np.array_equal(ref_r, got_r):
        raise ValueError(
            f"ONNX cascade passes {int(got_r.sum())} of {len(images)} patches to the main network, "
            f"PyTorch {int(ref_r.sum())}; model not written"
        )
    max_diff = float(np.max(np.abs(ref_p - got_p)))
    if max_diff > atol:
        raise ValueError(
            f"ONNX cascade output differs from PyTorch on {len(images)} patches: max |dp| = "
            f"{max_diff:.2e} (allowed {atol:.0e}); model not written"
        )
    rel = float(np.max(np.abs(ref_f - got_f) / np.maximum(np.abs(ref_f), 1.0)))
    if rel > 1e-3:
        raise ValueError(f"familiarity: ONNX differs from PyTorch by {rel:.2e} (relative)")
    return max_diff, rel
