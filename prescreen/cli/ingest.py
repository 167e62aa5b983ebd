"""Ingest DFT spillage results (CSV or JSON) into a campaign."""

from __future__ import annotations

import argparse
import sys

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("results", nargs="+", help="CSV or JSON files with id and spillage")
    parser.add_argument("--repeats", choices=("reject", "first", "last"), default="reject",
                        help="when one file gives an id twice with different values: reject "
                        "those rows (default), or keep the first or the last of them")
    parser.add_argument("--on-conflict", choices=("error", "keep", "replace"), default="error",
                        help="a different spillage for an ID that has one: reject the new "
                        "row (error, default), keep the old value, or replace it")


def run(args: argparse.Namespace) -> int:
    from prescreen.campaign import Campaign
    from prescreen.cli._render import print_rejections, print_table
    from prescreen.io.results import read_results

    landed = rejected = 0
    with Campaign.open(args.campaign) as campaign:
        for path in args.results:
            rows, refused = read_results(path, on_conflict=args.repeats)
            if not rows and not refused:
                print(f"{path}: the file holds no result rows", file=sys.stderr)
                continue
            report = campaign.ingest_results((rows, refused), on_conflict=args.on_conflict)
            print(f"{path}:")
            print_table([("added", report.added), ("unchanged", report.unchanged),
                         ("replaced", report.replaced), ("kept existing", report.kept_existing),
                         ("band gap added", report.gaps_added),
                         ("rejected", len(report.rejections))])
            print_rejections(report.rejections, campaign=str(campaign.path))
            landed += (report.added + report.unchanged + report.replaced + report.kept_existing
                       + report.gaps_added)
            rejected += len(report.rejections)
    # Exit 1 when nothing landed, so that scripts notice.
    return 0 if landed else 1
