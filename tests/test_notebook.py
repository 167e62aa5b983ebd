"""The walkthrough notebook runs from top to bottom without an error."""

from __future__ import annotations

from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat", reason="the notebook test needs the test extra")

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK = ROOT / "notebooks" / "campaign_walkthrough.ipynb"


@pytest.mark.filterwarnings("ignore")  # kernel start-up chatter (jupyter paths, zmq)
def test_walkthrough_notebook_executes(tmp_path):
    from nbclient import NotebookClient

    nb = nbformat.read(NOTEBOOK, as_version=4)
    NotebookClient(nb, timeout=300, kernel_name="python3",
                   resources={"metadata": {"path": str(ROOT)}}).execute()
    outputs = [o for cell in nb.cells if cell.cell_type == "code" for o in cell.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    # The last cell shows the campaign status with every valid row of the results file.
    from prescreen.io.results import read_results

    rows, rejected = read_results(ROOT / "examples" / "ferngrove" / "results.csv")
    last = nb.cells[-1].outputs[-1]["data"]["text/plain"]
    assert "CampaignStatus(" in last and f"labelled={len(rows)}" in last
