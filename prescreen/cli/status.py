"""Show what a campaign holds: candidates, flags, labels, rounds."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("--rejections", action="store_true",
                        help="list every rejected entry with its file, line and reason "
                        "(of each candidate file as last read: entries fixed since are kept "
                        "in the store but not listed)")
    parser.add_argument("--flagged", action="store_true",
                        help="list every candidate that is not a plain monolayer (not 2D, "
                        "ambiguous, formula only), a duplicate, or hazard-flagged, with why")
    parser.add_argument("--json", action="store_true", help="print the counts as JSON")


def run(args: argparse.Namespace) -> int:
    import json

    from prescreen.campaign import Campaign
    from prescreen.cli._render import print_table

    with Campaign.open(args.campaign) as campaign:
        st = campaign.status()
        if args.json:
            print(json.dumps(st.as_dict(), indent=2))
        else:
            print(f"campaign {st.name!r} ({st.path})")
            print_table([
                ("candidates", st.candidates),
                ("  with structure", st.with_structure),
                ("  formula only", st.formula_only),
                ("monolayers", st.monolayers),
                ("not two-dimensional", st.not_2d),
                ("ambiguous", st.ambiguous),
                ("duplicates", st.duplicates),
                ("toxic/radioactive flags", st.flagged_hazard),
                ("labelled", st.labelled),
                (f"positives (spillage >= {st.threshold:g})", st.positives),
                ("rounds", st.rounds),
                ("pending proposals", st.pending),
                ("models", st.models),
                ("rejected entries", st.rejections),
            ])
            print(f"built-in labeller: {campaign.describe_label_settings()}")
        if args.rejections:
            for rej in campaign.rejections():
                print(f"  {rej}")
        if args.flagged:
            frame = campaign.candidates_frame()
            odd = ((frame["layer_status"] != "monolayer") | frame["duplicate_of"].notna()
                   | (frame["hazard"].fillna("") != ""))
            print(f"{int(odd.sum())} flagged candidates:")
            for cid, r in frame[odd].iterrows():
                why = [str(r.layer_status).replace("_", " ")]
                if isinstance(r.layer_reason, str) and r.layer_reason:
                    why[0] += f" ({r.layer_reason})"
                if isinstance(r.duplicate_of, str):
                    why.append(f"duplicate of {r.duplicate_of}")
                if r.hazard:
                    why.append(str(r.hazard))
                print(f"  {cid}  {r.formula}  {r.source}: {'; '.join(why)}")
    return 0
