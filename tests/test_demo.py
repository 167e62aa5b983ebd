"""`make demo` end to end: the main job on the shipped data (``prescreen.demo``).

The README's quick start promises it on a fresh machine; this runs the same function on
the shipped ``examples/ferngrove/`` inputs and ``data_open/`` and checks what a user
opens afterwards. (The figures themselves belong to the demo's invented scenario and are
not reference values; only their consistency is checked here.)
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd

from prescreen.demo import ROUND_BUDGET_CORE_HOURS, run_demo

REPO = Path(__file__).resolve().parents[1]


def test_the_demo_writes_a_ranking_a_round_within_budget_and_the_report(tmp_path, capsys):
    written = run_demo(tmp_path / "demo", REPO / "examples" / "ferngrove", progress=False)
    said = capsys.readouterr().out
    assert "unknown element Jk" in said  # the bad wishlist entry is reported, not dropped
    assert "a probability is not a topological classification" in said
    n_read = int(re.search(r"read (\d+) candidates", said).group(1))
    ranking = pd.read_csv(written["ranking"])
    # every candidate read is ranked, once
    assert len(ranking) == n_read and ranking["rank"].is_monotonic_increasing
    assert ranking["probability"].between(0, 1).all()
    proposals = pd.read_csv(written["round"] / "proposals.csv")
    assert 0 < len(proposals) and proposals["cost_core_hours"].sum() <= ROUND_BUDGET_CORE_HOURS
    html = written["report"].read_text(encoding="utf-8")
    for part in ("ROC", "SHAP", "random", "core-hour", "Z2"):
        assert part in html, part
