"""Rank every candidate by its probability of high spillage (CSV and Parquet)."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]
from pathlib import Path


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("--out", type=Path, default=None,
                        help="output stem (default <campaign>/ranking); writes .csv and .parquet")
    parser.add_argument("--top", type=int, default=15, help="rows to print (default 15)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.acquire.rounds import WEAK_MODEL_ROC_AUC, rank, write_ranking
    from prescreen.campaign import Campaign

    with Campaign.open(args.campaign) as campaign:
        table = rank(campaign, progress=not args.no_progress)
        stem = args.out or campaign.path / "ranking"
    write_ranking(table, stem)
    shown = table.head(args.top)
    print(f"{'rank':>4}  {'id':<24} {'formula':<10} {'p':>5} {'spread':>6} {'core-h':>7}  flags")
    for cid, r in shown.iterrows():
        hours = r["cost_core_hours"]
        cost = "" if hours != hours else f"{hours:7.3g}"
        print(f"{r['rank']:>4}  {cid:<24} {r['formula']:<10} {r['probability']:5.2f} "
              f"{r['uncertainty']:6.2f} {cost:>7}  {r['flags']}")
    print(f"ranked {len(table)} candidates with model {table['model'].iloc[0]} "
          f"(p: probability of {table.attrs['positive_rule']}); "
          f"written to {stem.with_suffix('.csv')} and .parquet")
    auc = table.attrs.get("cv_roc_auc")
    if auc is not None:
        print(f"model check: grouped-CV ROC-AUC {auc:.2f} over {table.attrs['cv_rows']:.0f} "
              "labelled rows (0.5 = random)")
        if auc < WEAK_MODEL_ROC_AUC:
            print(f"warning: below {WEAK_MODEL_ROC_AUC:g}, this ranking is little better than "
                  "random selection; add your own results (`prescreen ingest`) and retrain "
                  "(`prescreen train`)")
    print("note: a probability is not a topological classification; confirm hits with an "
          "invariant (Z2).")
    return 0
