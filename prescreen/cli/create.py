"""Create a campaign folder from candidate sources."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]

from prescreen import SPILLAGE_THRESHOLD


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder to create")
    parser.add_argument("sources", nargs="*",
                        help="structure files, folders, globs or formula CSVs")
    parser.add_argument("--name", help="campaign name (default: the folder name)")
    parser.add_argument("--threshold", type=float, default=SPILLAGE_THRESHOLD,
                        help="spillage counted as a hit (default %(default)s, common practice)")
    parser.add_argument("--id-column", default=None,
                        help="ID column of formula CSVs (default: 'id', else 'name', else "
                        "<file stem>-<row>)")
    parser.add_argument("--formula-column", default="formula",
                        help="formula column of formula CSVs")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.campaign import Campaign
    from prescreen.cli.add import add_sources

    campaign = Campaign.create(args.campaign, name=args.name, threshold=args.threshold)
    print(f"created campaign {campaign.name!r} in {campaign.path}")
    if args.sources:
        return add_sources(campaign, args)
    return 0
