"""Propose the next batch to compute under a core-hour budget."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("--budget", type=float, required=True, help="core-hours for this round")
    parser.add_argument("--strategy", default="expected_hits_per_core_hour",
                        help="acquisition strategy (default %(default)s; also "
                        "greedy_probability, upper_confidence_bound, thompson_sampling, "
                        "explore_spread, explore_distance, random_selection)")
    parser.add_argument("--diversity", type=float, default=None,
                        help="weight of feature-space diversity in [0, 1] (default 0.3 for "
                        "the strategies that take one; random_selection takes none)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--max-core-hours-per-hit", type=float, default=None, metavar="H",
                        help="what a hit is worth to you: the stop rule advises stopping when "
                        "the next hit is expected to cost more core-hours than this")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.acquire.rounds import propose
    from prescreen.campaign import Campaign

    with Campaign.open(args.campaign) as campaign:
        rnd = propose(campaign, budget_core_hours=args.budget, strategy=args.strategy,
                      diversity=args.diversity, seed=args.seed,
                      max_core_hours_per_hit=args.max_core_hours_per_hit,
                      progress=not args.no_progress)
    low, high = rnd.expected_hits_interval
    print(f"round {rnd.number}: {len(rnd.table)} candidates, {rnd.total_cost:.3g} of "
          f"{rnd.budget:g} core-hours ({rnd.strategy})")
    print(f"expected hits {rnd.expected_hits:.2f} (90% interval {low:g}-{high:g})")
    for cid, r in rnd.table.iterrows():
        print(f"  {r['rank']:>3}. {cid:<24} {r.reason}")
    a = rnd.after
    if a["n_pool"]:
        print(f"left in the pool after this round: {a['expected_hits_left']:.2f} expected hits "
              f"({a['hits_left_low']:g}-{a['hits_left_high']:g}) among {int(a['n_pool'])} "
              f"candidates; about {a['core_hours_to_next_hit']:.3g} core-hours to the next hit")
    else:
        print("no candidates left in the pool after this round")
    print(f"stop rule: {a['advice']}")
    print(f"structures ready to run in {rnd.folder} (cif/ and batch.extxyz)")
    return 0
