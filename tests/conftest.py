"""Shared fixtures: a cut-down end-to-end demo run reused by the chain tests."""

from __future__ import annotations

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
TINY = REPO / "tiny_dataset"


class QuietCtx:
    """The CLI context object with quiet output, for calling command functions directly."""

    quiet = True
    debug = False

    @property
    def console(self):
        from rich.console import Console

        return Console(quiet=True)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory) -> tuple[Path, dict]:
    """Run the demo on 10 photos for 2 epochs once; returns (folder, headline)."""
    from trainkit.demo import run_demo

    out = tmp_path_factory.mktemp("demo")
    headline = run_demo(QuietCtx(), out, epochs=2, photos=10)
    return out, headline
