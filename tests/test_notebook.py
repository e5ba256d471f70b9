"""The walkthrough notebook runs end to end (nbclient, kernel python3) and leaves its files."""

from __future__ import annotations

import json
from pathlib import Path

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "walkthrough.ipynb"


def test_notebook_is_committed_without_outputs():
    nb = json.loads(NOTEBOOK.read_text(encoding="utf-8"))
    code = [c for c in nb["cells"] if c["cell_type"] == "code"]
    assert code
    assert all(not c.get("outputs") and c.get("execution_count") is None for c in code)


def test_walkthrough_runs_and_exports(tmp_path, monkeypatch):
    import nbclient  # dev extra
    import nbformat

    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(
        nb,
        timeout=600,
        kernel_name="python3",
        resources={"metadata": {"path": str(tmp_path)}},
    )
    client.execute()  # raises CellExecutionError on the first failing cell

    errors = [
        o
        for c in nb.cells
        if c.cell_type == "code"
        for o in c.get("outputs", [])
        if o.get("output_type") == "error"
    ]
    assert not errors
    exp = tmp_path / "walkthrough-output" / "experiment"
    assert (exp / "model.onnx").stat().st_size > 0
    card = (exp / "model-card.md").read_text(encoding="utf-8")
    assert "not an inspection" in card and "synthetic" in card
    metrics = json.loads((exp / "evaluation" / "metrics.json").read_text(encoding="utf-8"))
    assert f"{metrics['screening']['recall_interval']['n']} cracked" in card
    # The plots and the overlay were shown inline.
    images = [
        o
        for c in nb.cells
        if c.cell_type == "code"
        for o in c.get("outputs", [])
        if "image/png" in o.get("data", {})
    ]
    assert len(images) >= 3
