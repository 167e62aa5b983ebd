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
    # The status cell shows the campaign with every valid row of the results file.
    from prescreen.invariants import read_invariants
    from prescreen.io.results import read_results

    rows, rejected = read_results(ROOT / "examples" / "ferngrove" / "results.csv")
    code = [c for c in nb.cells if c.cell_type == "code"]
    status = next(c for c in code if c.source.strip() == "campaign.status()")
    text = status.outputs[-1]["data"]["text/plain"]
    assert "CampaignStatus(" in text and f"labelled={len(rows)}" in text
    # The Z2 section lists the group's checks and draws a flow as an image.
    checks = read_invariants(ROOT / "examples" / "ferngrove" / "z2.csv")
    table = next(c for c in code if "read_invariants(" in c.source).outputs[-1]["data"]
    assert all(cid in table["text/plain"] for cid in checks)
    figure = next(c for c in code if "plot_flow(" in c.source).outputs[-1]["data"]
    assert "image/png" in figure
