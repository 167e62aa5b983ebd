"""Write notebooks/campaign_walkthrough.ipynb (unexecuted) from the cells below.

Run: ``python scripts/make_notebook.py``. The tests execute the notebook with nbclient.
"""

from __future__ import annotations

from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

CELLS = [
    ("md", "# A screening campaign through the Python API\n\n"
           "This notebook walks the invented Ferngrove group's campaign from candidate files "
           "to a proposed batch, using the same library calls as the `prescreen` command. "
           "Run it from the repository root (or `notebooks/`)."),
    ("code", "import os\nfrom pathlib import Path\n"
             "if Path.cwd().name == 'notebooks':\n    os.chdir('..')\n"
             "import tempfile\n"
             "from prescreen.campaign import Campaign\n"
             "from prescreen.io.structures import iter_candidates\n"
             "from prescreen.io.results import read_results\n"
             "from prescreen.acquire import rounds\n"
             "work = Path(tempfile.mkdtemp())\nwork"),
    ("md", "## 1. Read the candidates\nEvery entry is checked for being a monolayer and for "
           "repeating an earlier one; bad entries are kept as rejections with file, line and "
           "reason."),
    ("code", "inputs = Path('examples/ferngrove')\n"
             "# results, Z2 checks and their Wannier-centre flows are not candidates\n"
             "sources = [p for p in sorted(inputs.iterdir())\n"
             "           if p.name not in ('results.csv', 'z2.csv', 'z2_flows')]\n"
             "campaign = Campaign.create(work / 'campaign', name='ferngrove-notebook')\n"
             "report = campaign.add_candidates(iter_candidates(sources))\n"
             "report.added, report.layer_counts, report.duplicates, report.rejections"),
    ("code", "campaign.candidates_frame()[['formula', 'layer_status', 'thickness_A', "
             "'vacuum_A', 'duplicate_of', 'hazard']].head(12)"),
    ("md", "## 2. Ingest earlier DFT results"),
    ("code", "ingest = campaign.ingest_results(read_results(inputs / 'results.csv'))\n"
             "ingest.added, campaign.status().positives"),
    ("md", "## 3. Train on the open dataset plus these results\n"
           "Validation folds are grouped by chemical system and reduced formula, so "
           "polymorphs never straddle a fold."),
    ("code", "trained = rounds.train(campaign, n_models=3, progress=False)\n"
             "trained.version, trained.n_rows, trained.metrics"),
    ("md", "## 4. Rank and propose under a budget\n"
           "A probability is not a topological classification: confirm hits with an "
           "invariant (Z2)."),
    ("code", "ranking = rounds.rank(campaign, progress=False)\n"
             "ranking[['rank', 'formula', 'probability', 'uncertainty', 'cost_core_hours', "
             "'flags']].head(10)"),
    ("code", "proposal = rounds.propose(campaign, budget_core_hours=0.05, progress=False)\n"
             "proposal.table[['formula', 'probability', 'cost_core_hours', 'reason']]"),
    ("code", "campaign.status()"),
    ("md", "## 5. Check the hits with a Z2 invariant\n"
           "`prescreen.invariants.compute_invariants(campaign, ids)` (or `prescreen z2`) runs "
           "GPAW: parity eigenvalues for layers with an inversion centre, Wilson loops for the "
           "others. It takes tens of seconds to minutes per small cell, so here we read the "
           "group's earlier results instead, and plot the flow of Wannier charge centres "
           "behind one of them."),
    ("code", "import pandas as pd\n"
             "from prescreen.invariants import read_flow, read_invariants\n"
             "from prescreen.physics.wilson import plot_flow\n"
             "checks = read_invariants(inputs / 'z2.csv')\n"
             "pd.DataFrame(checks).T[['formula', 'z2', 'method', 'direct_gap_soc_eV', "
             "'status']]"),
    ("code", "%matplotlib inline\n"
             "flow = read_flow(inputs / 'z2.csv', 'fg-tmd-001')\n"
             "ax = plot_flow(flow)\n"
             "ax.figure"),
]


def main() -> None:
    nb = new_notebook()
    nb.cells = [new_markdown_cell(src) if kind == "md" else new_code_cell(src)
                for kind, src in CELLS]
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3",
                                 "language": "python"}
    out = Path(__file__).resolve().parents[1] / "notebooks" / "campaign_walkthrough.ipynb"
    nbformat.write(nb, out)
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
