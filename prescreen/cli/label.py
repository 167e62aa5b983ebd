"""Compute spillage with the built-in DFT labeller (GPAW) and ingest it."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("ids", nargs="*", help="candidate IDs (default: all pending proposals)")
    parser.add_argument("--workers", type=int, default=1,
                        help="parallel single-core calculations (default 1)")
    parser.add_argument("--timeout", type=float, default=1800.0,
                        help="wall-time limit per structure in seconds (default 1800)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.acquire.rounds import label_pending
    from prescreen.campaign import Campaign

    with Campaign.open(args.campaign) as campaign:
        out = label_pending(campaign, ids=args.ids or None, workers=args.workers,
                            timeout_s=args.timeout, progress=not args.no_progress)
    print(f"labelled {out.n_ok} of {out.n_jobs} ({out.core_hours:.3f} core-hours this run); "
          f"ingested {out.n_ingested} new results")
    for cid, reason in out.failures:
        print(f"  failed: {cid}: {reason}")
    print(f"raw records in {out.out_dir}")
    return 0
