"""Shared fixtures: a cut-down end-to-end demo run reused by the chain tests."""

from __future__ import annotations

import importlib.util
import sys
from contextlib import contextmanager
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
TINY = REPO / "tiny_dataset"


@pytest.fixture(scope="session")
def demo_events() -> list[tuple]:
    """What the session's demo run reported through its DemoProgress callbacks, in order."""
    return []


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory, demo_events) -> tuple[Path, dict]:
    """Run the demo on 10 photos for 2 epochs once; returns (folder, headline)."""
    from contextlib import contextmanager

    from trainkit.demo import DemoProgress, run_demo

    class Recorder(DemoProgress):
        def section(self, title):
            demo_events.append(("section", title))

        def line(self, text, *, caution=False):
            demo_events.append(("line", text, caution))

        @contextmanager
        def task(self, description, total=None):
            demo_events.append(("task", description, total))
            with super().task(description, total) as handle:  # the silent default handle
                yield handle

        def epoch_done(self, row, false_alarm_budget):
            demo_events.append(("epoch", row["epoch"], false_alarm_budget))

        def split_done(self, report):
            demo_events.append(("split", report))

        def evaluated(self, metrics, folder):
            demo_events.append(("evaluated", metrics, folder))

    out = tmp_path_factory.mktemp("demo")
    headline = run_demo(out, epochs=2, photos=10, progress=Recorder())
    return out, headline


@contextmanager
def benchmark_module(name: str):
    """A script of benchmarks/ imported as the module ``name`` (the folder is not a package).

    It is registered in ``sys.modules`` while in use (a dataclass looks its module up while
    it is defined) and the folder is on ``sys.path`` (the scripts import each other).
    """
    folder = str(REPO / "benchmarks")
    spec = importlib.util.spec_from_file_location(name, REPO / "benchmarks" / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.path.insert(0, folder)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
        yield module
    finally:
        sys.modules.pop(name, None)
        sys.path.remove(folder)
