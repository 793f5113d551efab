"""The notebook that walks the whole job runs from top to bottom."""

from __future__ import annotations

from pathlib import Path

import nbformat
from nbclient import NotebookClient

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "whole_trial.ipynb"


def test_notebook_runs_end_to_end(tmp_path):
    nb = nbformat.read(NOTEBOOK, as_version=4)
    NotebookClient(
        nb, timeout=600, kernel_name="python3", resources={"metadata": {"path": str(tmp_path)}}
    ).execute()
    outputs = "".join(
        o.get("text", "") for cell in nb.cells if cell.cell_type == "code" for o in cell.outputs
    )
    assert "Verdict" in outputs  # the design check printed
    assert "treated vs pure control" in outputs  # the analysis printed
