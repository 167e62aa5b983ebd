"""The demo behind ``make demo``: the main job on the shipped example inputs.

Scenario (invented): the Ferngrove Layered Matter Group holds a mixed list of candidate
monolayers and asks which to compute first. The demo builds their campaign from the
files in ``examples/ferngrove/`` and prints what it holds.

Run: ``python -m prescreen.demo --out demo_out`` (the output folder is rebuilt each run).
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from collections.abc import Sequence
from pathlib import Path

__all__ = ["main", "run_demo"]

EXAMPLES = Path("examples") / "ferngrove"


def run_demo(out: Path, inputs: Path = EXAMPLES, *, progress: bool = True) -> Path:
    """Build the demo campaign in ``out/campaign`` and return its path."""
    from prescreen.campaign import Campaign
    from prescreen.cli._render import print_rejections
    from prescreen.io.structures import iter_candidates

    if not inputs.is_dir():
        raise FileNotFoundError(
            f"{inputs}: demo inputs not found; run from the repository root "
            "or regenerate them with `python scripts/make_demo_inputs.py`"
        )
    if out.exists():
        shutil.rmtree(out)
    campaign_dir = out / "campaign"
    with Campaign.create(campaign_dir, name="ferngrove-winter-screen") as campaign:
        report = campaign.add_candidates(iter_candidates([inputs]), progress=progress)
        print(f"read {report.added} candidates from {inputs}")
        print_rejections(report.rejections, stream=sys.stdout, campaign=str(campaign_dir))
    return campaign_dir


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m prescreen.demo", description=__doc__)
    parser.add_argument("--out", type=Path, default=Path("demo_out"))
    parser.add_argument("--inputs", type=Path, default=EXAMPLES)
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    campaign_dir = run_demo(args.out, args.inputs)
    from prescreen.cli.main import main as cli

    cli(["status", str(campaign_dir)])
    print(f"demo finished in {time.perf_counter() - t0:.1f} s; campaign at {campaign_dir}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
