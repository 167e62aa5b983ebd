"""Add more candidate sources to an existing campaign."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("sources", nargs="+",
                        help="structure files, folders, globs or formula CSVs")
    parser.add_argument("--id-column", default=None,
                        help="ID column of formula CSVs (default: 'id', else 'name', else "
                        "<file stem>-<row>)")
    parser.add_argument("--formula-column", default="formula",
                        help="formula column of formula CSVs")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def add_sources(campaign, args: argparse.Namespace) -> int:
    """Read ``args.sources`` into ``campaign`` and print what happened."""
    from prescreen.cli._render import print_rejections, print_table
    from prescreen.io.structures import iter_candidates

    items = iter_candidates(args.sources, id_column=args.id_column,
                            formula_column=args.formula_column)
    report = campaign.add_candidates(items, progress=not args.no_progress)
    rows = [("added", report.added), ("already present", report.already_present),
            ("duplicates found", report.duplicates)]
    rows += [(f"  {k}", v) for k, v in sorted(report.layer_counts.items())]
    rows.append(("rejected", len(report.rejections)))
    print_table(rows)
    print_rejections(report.rejections, campaign=str(campaign.path))
    # Exit 1 when sources were given but nothing from them is in the campaign, so that a
    # script with a mistyped folder stops here rather than at `rank`.
    return 1 if not (report.added or report.already_present) else 0


def run(args: argparse.Namespace) -> int:
    from prescreen.campaign import Campaign

    with Campaign.open(args.campaign) as campaign:
        return add_sources(campaign, args)
