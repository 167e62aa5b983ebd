"""Train the classifier on the open data plus the campaign's own results."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run"]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("--no-open-data", action="store_true",
                        help="train on the campaign's own results only")
    parser.add_argument("--campaign-weight", type=float, default=1.0,
                        help="weight of the campaign's own rows relative to open rows "
                        "(default %(default)s)")
    parser.add_argument("--only", action="append", default=[], metavar="KEY=VALUE",
                        help="use only the campaign's results whose provenance matches, e.g. "
                        "--only functional=PBE (keys: functional, code, kmesh; repeatable)")
    parser.add_argument("--min-gap", type=float, default=None, metavar="EV",
                        help="count a label as positive only if its band gap with spin-orbit "
                        "coupling is at least EV as well (a high spillage in a metal is not an "
                        "inversion across a gap); every result then needs gap_soc_eV")
    parser.add_argument("--models", type=int, default=5, help="ensemble members")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.acquire.rounds import positive_rule, train
    from prescreen.campaign import Campaign
    from prescreen.cli._render import print_table

    from prescreen.errors import InputError

    if args.min_gap is not None and not (args.min_gap >= 0 and args.min_gap != float("inf")):
        raise InputError("bad --min-gap", value=args.min_gap,
                         expected="a band gap in eV, >= 0, e.g. --min-gap 0.02")
    only: dict[str, str] = {}
    for item in args.only:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise InputError("bad --only filter", value=item, expected="KEY=VALUE, e.g. functional=PBE")
        if key in only:
            raise InputError("--only names a key twice", value=item,
                             expected=f"one value per key ({key}={only[key]} given already)")
        only[key] = value
    with Campaign.open(args.campaign) as campaign:
        result = train(campaign, use_open=not args.no_open_data,
                       campaign_weight=args.campaign_weight, campaign_filter=only,
                       n_models=args.models, random_state=args.seed,
                       min_gap_eV=args.min_gap, progress=not args.no_progress)
        rule = positive_rule(campaign.threshold, args.min_gap)
    m = result.metrics
    print(f"trained {result.version} on {result.n_rows} rows ({result.n_positive} positive: "
          f"{rule})")
    n_folds = len(result.cv_table) - 3  # per-fold rows, then mean, std and pooled
    if n_folds > 0:
        print(f"grouped {n_folds}-fold cross-validation (mean over folds):")
        print_table([(k, f"{m[k]:.3f}") for k in ("roc_auc", "pr_auc", "brier", "log_loss",
                                                  "ece") if k in m])
    else:
        print("unvalidated: too few labelled rows of each class for grouped folds")
    print(f"model written to {result.path}")
    return 0
