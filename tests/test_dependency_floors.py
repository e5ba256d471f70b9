"""Dependency floors where the protections the kit relies on hold, and those protections at work.

Sources: CVE-2025-32434 (torch.load with weights_only=True could be bypassed before torch
2.6; see /work/shared/REFERENCES.md). ONNX Runtime's refusal of external data outside the
model's folder was measured on the versions named in pyproject.toml with the model built in
``_external_data_model`` (1.18.0 and 1.23.2 read the file outside; 1.24.1 refuses).
"""

from __future__ import annotations

import ast
import builtins
import importlib.metadata
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
from packaging.requirements import Requirement
from packaging.version import Version

REPO = Path(__file__).resolve().parents[1]


def _requirements() -> dict[str, Requirement]:
    project = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    reqs = [*project["dependencies"], *project["optional-dependencies"]["train"]]
    return {(r := Requirement(s)).name: r for s in reqs}


@pytest.mark.parametrize(
    "name,unsafe,safe",
    [
        ("torch", "2.5.1", "2.6.0"),  # CVE-2025-32434: weights_only bypass, fixed in 2.6
        ("torchvision", "0.20.1", "0.21.0"),  # the releases built for torch 2.5 and 2.6
        ("onnxruntime", "1.23.2", "1.24.1"),  # measured: external data outside the folder
    ],
)
def test_floors_exclude_versions_without_the_protection(name, unsafe, safe):
    spec = _requirements()[name].specifier
    assert not spec.contains(unsafe) and spec.contains(safe)
    installed = Version(importlib.metadata.version(name)).base_version  # "2.14.1+cu130" -> 2.14.1
    assert spec.contains(installed), f"installed {name} {installed} is below the floor {spec}"


def _torch_load_calls():
    for path in sorted((REPO / "trainkit").rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            f = getattr(node, "func", None)
            if (
                isinstance(node, ast.Call)
                and isinstance(f, ast.Attribute)
                and f.attr == "load"
                and isinstance(f.value, ast.Name)
                and f.value.id == "torch"
            ):
                yield f"{path.relative_to(REPO)}:{node.lineno}", node


def test_every_torch_load_in_the_kit_is_weights_only():
    calls = dict(_torch_load_calls())
    assert len(calls) >= 4  # checkpoints, resume state, weight files, the job check
    for where, call in calls.items():
        kw = {k.arg: k.value for k in call.keywords}
        assert "weights_only" in kw and getattr(kw["weights_only"], "value", None) is True, where


class _Exec:
    """Unpickling this would run Python source through exec (a code object at load time)."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (builtins.exec, (f"open({str(self.marker)!r}, 'w').close()",))


def test_a_checkpoint_that_would_exec_code_is_refused_and_runs_nothing(tmp_path):
    from trainkit.learning.network import TrainingError, load_checkpoint

    marker = tmp_path / "ran"
    evil = tmp_path / "checkpoint.pt"
    torch.save({"format": "trainkit-checkpoint-1", "model": _Exec(marker)}, evil)
    with pytest.raises(TrainingError, match="cannot be loaded as a trainkit checkpoint"):
        load_checkpoint(evil)
    assert not marker.exists()
    # The same file through a plain (unsafe) load would have run it: the test means something.
    torch.load(evil, weights_only=False)
    assert marker.exists()


def _external_data_model(path: Path, location: str) -> None:
    """A one-Add ONNX graph whose initializer's 4 floats live in an external file."""
    from onnx import TensorProto, helper

    w = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[4])
    w.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", "16")):
        entry = w.external_data.add()
        entry.key, entry.value = key, value
    graph = helper.make_graph(
        [helper.make_node("Add", ["x", "w"], ["y"])],
        "g",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [4])],
        initializer=[w],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 13)])
    model.ir_version = 8
    path.write_bytes(model.SerializeToString())


def test_onnx_external_data_outside_the_model_folder_is_refused(tmp_path):
    import onnxruntime as ort

    from trainkit.screener import Screener
    from trainkit.screener.model import ScreenerError

    folder = tmp_path / "model"
    folder.mkdir()
    np.arange(4, dtype=np.float32).tofile(folder / "inside.bin")
    (np.arange(4, dtype=np.float32) + 100).tofile(tmp_path / "secret.bin")
    (folder / "link.bin").symlink_to(tmp_path / "secret.bin")
    _external_data_model(folder / "inside.onnx", "inside.bin")
    inside = ort.InferenceSession(str(folder / "inside.onnx"), providers=["CPUExecutionProvider"])
    assert inside.run(None, {"x": np.zeros(4, np.float32)})[0].tolist() == [0, 1, 2, 3]
    for name, location in (
        ("up", "../secret.bin"),
        ("absolute", str(tmp_path / "secret.bin")),
        ("symlink", "link.bin"),
    ):
        _external_data_model(folder / f"{name}.onnx", location)
        with pytest.raises(ScreenerError, match="[Ee]xternal data"):
            Screener(folder / f"{name}.onnx")
