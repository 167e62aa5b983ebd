"""Compute the Z2 invariant of candidates with DFT (GPAW): parities or Wilson loops."""

from __future__ import annotations

import argparse
from pathlib import Path

__all__ = ["add_arguments", "run", "print_outcomes"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("ids", nargs="*",
                        help="candidate IDs (default: every labelled hit whose bands with SOC are "
                        "apart at every k and that has no invariant yet, was refused by the "
                        "parity method alone, or by Wilson loops with fewer points than now "
                        "allowed)")
    parser.add_argument("--out", type=Path, default=None,
                        help="CSV to update (default <campaign>/z2.csv; rows of other IDs "
                        "are kept)")
    parser.add_argument("--method", choices=("auto", "parity", "wilson"), default="auto",
                        help="parity eigenvalues at the TRIMs (needs an inversion centre) or "
                        "Wilson loops (any layer); auto takes parities when the layer is "
                        "centrosymmetric (default: auto)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def print_outcomes(outcomes, path: Path, settings) -> None:
    """One line per candidate, where the file is, and the caution (``settings``: the
    campaign's :class:`~prescreen.physics.dft.LabelSettings`)."""
    computed = 0
    for outcome in outcomes:
        print(f"  {outcome.describe()}")
        computed += outcome.row.get("status") == "ok"
    print(f"written to {path}")
    if computed:
        print(f"note: Z2 = 1 at this level of theory ({settings.describe(mesh=False)}; the "
              "Z2 mesh is in the kmesh column) is strong evidence, not proof; check the gap, "
              "the functional and whether the layer is magnetic.")
    else:
        print("no invariant was computed: every candidate was refused (reasons above)")


def _retry(row: dict[str, str]) -> bool:
    """Whether ``prescreen z2`` without IDs computes a recorded refusal again: one by the
    parity method for want of an inversion (from before Wilson loops, which need none), or
    coarse Wilson loops refused below today's cap on points per loop. A result, or any
    other refusal (touching bands, an odd electron count), would come again."""
    from prescreen.physics.wilson import refused_below_cap

    if row["status"] == "ok":
        return False
    return ((row["method"] != "wilson" and "inversion" in row["reason"])
            or refused_below_cap(row["reason"]))


def run(args: argparse.Namespace) -> int:
    from prescreen.campaign import Campaign
    from prescreen.invariants import (INVARIANTS_FILE, compute_invariants, gapped_hits,
                                      read_invariants)

    with Campaign.open(args.campaign) as campaign:
        out = args.out or campaign.path / INVARIANTS_FILE
        ids = args.ids
        if not ids:
            done = {i for i, row in read_invariants(out).items() if not _retry(row)}
            ids = [i for i in gapped_hits(campaign) if i not in done]
            if not ids:
                print("nothing to compute: no labelled hit whose bands with SOC are apart "
                      "at every k lacks an invariant (name candidate IDs to compute others)")
                return 0
        outcomes = compute_invariants(campaign, ids, out=out, method=args.method,
                                      progress=not args.no_progress)
        settings = campaign.label_settings()
    print_outcomes(outcomes, out, settings)
    return 0
