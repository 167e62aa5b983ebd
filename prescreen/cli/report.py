"""Write the allocation report (one HTML file) for a campaign round."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]
from pathlib import Path


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("--round", type=int, default=None, dest="round_number",
                        help="round to report on (default: the latest)")
    parser.add_argument("--out", type=Path, default=None,
                        help="HTML file to write (default <campaign>/report-round-NNN.html)")
    parser.add_argument("--pdf", action="store_true",
                        help="also print the report to PDF (needs Chromium)")
    parser.add_argument("--replay", action="store_true",
                        help="add discovery curves from a retrospective replay on the "
                        "labelled data (minutes; skipped, with the reason, below "
                        "prescreen.acquire.rounds.MIN_REPLAY_ROWS labelled rows or "
                        "MIN_REPLAY_POSITIVES positives)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.campaign import Campaign
    from prescreen.errors import CampaignError
    from prescreen.report import build_report, write_pdf

    progress = not args.no_progress
    with Campaign.open(args.campaign) as campaign:
        latest = campaign.status().rounds
        if not latest:
            raise CampaignError(f"{campaign.path}: no round proposed yet; run "
                                "`prescreen propose` first")
        number = latest if args.round_number is None else args.round_number
        if not 1 <= number <= latest:
            from prescreen.errors import InputError

            raise InputError("no such round", value=number,
                             expected=f"a round number from 1 to {latest}")
        name = f"report-round-{number:03d}.html"
        out = args.out or campaign.path / name
        if out.is_dir():  # a folder: the report goes inside it
            out = out / name
        curves = None
        if args.replay:
            from prescreen.acquire.rounds import replay_labelled
            from prescreen.errors import InputError
            from prescreen.report.build import round_model_settings

            # replayed with the training data and hit rule of the round's model
            settings = round_model_settings(campaign, number)
            try:
                use_open = bool(settings.get("use_open", True))
                curves = replay_labelled(campaign, use_open=use_open,
                                         min_gap_eV=settings.get("min_gap_eV"),
                                         progress=progress)
            except (CampaignError, InputError) as exc:
                print(f"replay skipped: {exc}")
            else:
                if curves is None:
                    from prescreen.acquire.rounds import (MIN_REPLAY_POSITIVES,
                                                          MIN_REPLAY_ROWS, training_table)

                    table = training_table(campaign, use_open=use_open,
                                           min_gap_eV=settings.get("min_gap_eV"),
                                           progress=False)
                    print(f"replay skipped: {len(table)} labelled rows with "
                          f"{int(table.y.sum())} positives; a replay needs at least "
                          f"{MIN_REPLAY_ROWS} rows and {MIN_REPLAY_POSITIVES} positives")
        path = build_report(campaign, out_path=out, round_number=number,
                            replay_curves=curves, progress=progress)
    print(f"report written to {path}")
    if args.pdf:
        pdf = write_pdf(path)
        print(f"PDF written to {pdf}" if pdf else "PDF skipped: Chromium not found")
    return 0
