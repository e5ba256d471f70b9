"""The package layout: no import cycles, a torch-free core and screener, a command line that says what is missing.

The import graph is read statically with ``ast`` from every module under trainkit/,
imports inside functions and inside ``if TYPE_CHECKING:`` included (a type-only import
still says which room a module leans on, so it obeys the same order). An edge goes to the most specific trainkit module an import names
(``from trainkit.core import grid`` -> ``trainkit.core.grid``); the implicit import of
a parent package that Python does first is not an edge, as in common import-graph tools.
"""

from __future__ import annotations

import ast
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "trainkit"

#: Rooms the torch-free core and screener must never import.
_TRAINING_SIDE = "store intake labels learning judging export jobs synth cli demo".split()
HEAVY_ROOMS = tuple(f"trainkit.{r}" for r in _TRAINING_SIDE)
#: Third-party packages that only the train extra brings.
HEAVY_PACKAGES = ("torch", "torchvision", "cv2", "sklearn", "scipy")


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def all_modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _catches_import_error(node: ast.Try) -> bool:
    names = {"ImportError", "ModuleNotFoundError"}
    for h in node.handlers:
        kinds = h.type.elts if isinstance(h.type, ast.Tuple) else [h.type]
        if any(isinstance(k, ast.Name) and k.id in names for k in kinds):
            return True
    return False


def imported_names(path: Path, name: str, *, skip_optional: bool = False) -> list[str]:
    """Every absolute name a module imports (``pkg.mod`` and ``pkg.mod.attr``), lazily or not.

    With ``skip_optional``, imports inside ``try`` blocks that catch ImportError (an optional
    accelerator, with a fallback when it is missing) are left out.
    """
    is_package = path.name == "__init__.py"
    found: list[str] = []

    def visit(node: ast.AST) -> None:
        if skip_optional and isinstance(node, ast.Try) and _catches_import_error(node):
            for child in [*node.handlers, *node.orelse, *node.finalbody]:
                visit(child)
            return
        if isinstance(node, ast.Import):
            found.extend(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                parts = name.split(".")
                keep = len(parts) - node.level + (1 if is_package else 0)
                base = ".".join(parts[:keep] + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            found.append(base)
            found.extend(f"{base}.{a.name}" for a in node.names)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(ast.parse(path.read_text(encoding="utf-8"), filename=str(path)))
    return found


def import_graph() -> dict[str, set[str]]:
    """trainkit module -> the trainkit modules it imports."""
    modules = all_modules()
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        targets = set()
        for imported in imported_names(path, name):
            # the most specific module named: pkg.mod.attr -> pkg.mod when attr is not a module
            while imported and imported not in modules:
                imported = imported.rpartition(".")[0]
            if imported and imported != name:
                targets.add(imported)
        graph[name] = targets
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def strongconnect(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph.get(v, ())):
            if w not in index:
                strongconnect(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            strongconnect(v)
    return found


def test_the_cycle_finder_finds_a_planted_cycle_and_resolves_relative_imports(tmp_path):
    """The checker itself: a cycle of three plus a clean branch, and relative-import resolution."""
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a", "d"}, "d": set()}
    assert cycles(graph) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []
    src = tmp_path / "m.py"
    src.write_text(
        "from typing import TYPE_CHECKING\n"
        "from .grid import Box\n"
        "def f():\n    from ..labels import workspace\n"
        "if TYPE_CHECKING:\n    from trainkit.learning import training\n"
    )
    names = imported_names(src, "trainkit.core.m")
    assert "trainkit.core.grid.Box" in names and "trainkit.labels.workspace" in names
    assert "trainkit.learning.training" in names  # type-only imports count too


def test_the_package_has_no_import_cycles():
    graph = import_graph()
    assert "trainkit.cli.group" in graph and "trainkit.demo" in graph  # the walk saw the tree
    found = cycles(graph)
    assert not found, "import cycles between trainkit modules:\n" + "\n".join(
        " <-> ".join(c) for c in found
    )


def test_demo_and_command_line_import_in_one_direction():
    graph = import_graph()
    assert not {m for m in graph["trainkit.demo"] if m.startswith("trainkit.cli")}
    assert "trainkit.demo" in graph["trainkit.cli.demo"]


@pytest.mark.parametrize("room", ["trainkit.core", "trainkit.screener"])
def test_core_and_screener_import_nothing_heavy(room):
    modules = all_modules()
    checked = 0
    for name, path in modules.items():
        if name != room and not name.startswith(room + "."):
            continue
        checked += 1
        bad = [
            n
            for n in imported_names(path, name, skip_optional=True)
            if n.startswith(HEAVY_ROOMS) or n.split(".")[0] in HEAVY_PACKAGES
        ]
        assert not bad, f"{name} imports {sorted(set(bad))}"
    assert checked >= 3


BLOCKER = textwrap.dedent(
    """
    import importlib.abc, sys

    BLOCKED = {blocked!r}

    class Block(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in BLOCKED:
                raise ModuleNotFoundError(f"No module named {{name!r}} (blocked)", name=name)
            return None

    sys.meta_path.insert(0, Block())
    """
)


def run_blocked(blocked: tuple[str, ...], code: str) -> subprocess.CompletedProcess:
    """Run ``code`` in a fresh interpreter in which ``blocked`` packages cannot be imported."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-c", BLOCKER.format(blocked=blocked) + textwrap.dedent(code)],
        capture_output=True,
        text=True,
        env=env,
        cwd=ROOT,
        timeout=120,
    )


def _tiny_model(path: Path, patch_px: int = 16) -> Path:
    """A hand-built ONNX screener: logits (mean/64, -mean/64) over the patch's mean value."""
    import onnx
    from onnx import TensorProto, helper

    image = helper.make_tensor_value_info("image", TensorProto.UINT8, ["N", patch_px, patch_px, 3])
    probs = helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 2])
    nodes = [
        helper.make_node("Cast", ["image"], ["x"], to=TensorProto.FLOAT),
        helper.make_node("ReduceMean", ["x", "axes"], ["m"], keepdims=0),
        helper.make_node("Div", ["m", "c64"], ["l0"]),
        helper.make_node("Neg", ["l0"], ["l1"]),
        helper.make_node("Unsqueeze", ["l0", "ax1"], ["u0"]),
        helper.make_node("Unsqueeze", ["l1", "ax1"], ["u1"]),
        helper.make_node("Concat", ["u0", "u1"], ["logits"], axis=1),
        helper.make_node("Softmax", ["logits"], ["probabilities"], axis=1),
    ]
    inits = [
        helper.make_tensor("axes", TensorProto.INT64, [3], [1, 2, 3]),
        helper.make_tensor("c64", TensorProto.FLOAT, [], [64.0]),
        helper.make_tensor("ax1", TensorProto.INT64, [1], [1]),
    ]
    graph = helper.make_graph(nodes, "mean", [image], [probs], initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    model.ir_version = 9
    helper.set_model_props(
        model,
        {
            "trainkit.format": "trainkit-screener-1",
            "class_names": json.dumps(["none", "crack"]),
            "patch_px": str(patch_px),
            "threshold": json.dumps(0.5),
        },
    )
    onnx.checker.check_model(model, full_check=True)
    onnx.save(model, path)
    return path


def test_screener_runs_without_the_train_extra(tmp_path):
    """`import trainkit.screener` and a Screener run with torch, OpenCV, SciPy... unimportable."""
    import onnxruntime as ort

    model = _tiny_model(tmp_path / "m.onnx")
    patches = np.random.default_rng(0).integers(0, 256, (5, 16, 16, 3), dtype=np.uint8)
    np.save(tmp_path / "patches.npy", patches)
    blocked = (*HEAVY_PACKAGES, "yaml", "click", "rich")
    res = run_blocked(
        blocked,
        f"""
        import json, sys
        import numpy as np
        import trainkit.screener
        from trainkit.screener import Screener
        with Screener({str(model)!r}, threads=1) as scr:
            p = scr.predict(np.load({str(tmp_path / "patches.npy")!r}))
        heavy = sorted(m for m in sys.modules if m.split(".")[0] in {blocked!r})
        print(json.dumps({{"p": p.tolist(), "heavy": heavy}}))
        """,
    )
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert out["heavy"] == []
    # reference: ONNX Runtime on the same model and patches, in this process
    sess = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
    expected = sess.run(None, {"image": patches})[0]
    np.testing.assert_allclose(np.array(out["p"]), expected, rtol=1e-6, atol=1e-7)


def test_the_blocker_does_block():
    """The subprocess above proves something only if the blocker really stops an import."""
    res = run_blocked(("click",), "import click")
    assert res.returncode != 0 and "blocked" in res.stderr


@pytest.mark.parametrize("missing", ["click", "rich"])
def test_command_line_without_the_train_extra_says_what_to_install(missing):
    res = run_blocked(
        (missing,),
        """
        import sys
        from trainkit.cli import main
        sys.exit(main(["--help"]))
        """,
    )
    assert res.returncode == 2, res.stderr
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr
    assert lines[0].startswith("trainkit: ") and f"needs {missing}" in lines[0]
    assert "pip install 'trainkit-concrete[train]'" in lines[0]


#: The rooms in dependency order: a module may import its own room and the rooms before it.
ROOM_ORDER = {
    "core": 0, "screener": 1, "synth": 1, "metrics": 2, "store": 3, "intake": 4, "labels": 5,
    "learning": 6, "judging": 7, "export": 8, "jobs": 9, "cli": 10, "demo": 10, "__main__": 11,
}  # fmt: skip


def test_rooms_import_only_rooms_before_them():
    """The folders show the dependency direction (DEVELOPERS.md): no room reaches forward."""
    graph = import_graph()
    assert set(ROOM_ORDER) >= {m.split(".")[1] for m in graph if "." in m}
    backward = [
        (a, b)
        for a, targets in graph.items()
        if "." in a
        for b in targets
        if "." in b and ROOM_ORDER[b.split(".")[1]] > ROOM_ORDER[a.split(".")[1]]
    ]
    assert backward == []
