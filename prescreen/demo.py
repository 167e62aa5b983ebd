"""The demo behind ``make demo``: the main job on the shipped data.

Scenario (invented): the Ferngrove Layered Matter Group holds a mixed list of candidate
monolayers and an allocation of core-hours, and asks which to compute first. Their list
is the hand-made files in ``examples/ferngrove/`` plus a structure search a colleague
ran (here: :data:`SEARCH_SIZE` unlabelled monolayers drawn from the open pool in
``data_open/``). The demo builds their campaign, ingests the spillage results they
already have, trains the classifier on the open dataset plus those results, ranks every
candidate, proposes the next batch under this round's budget, and writes the report.
The group computes with prescreen's own labeller on a workstation, so costs are
predicted by the cost model fitted to the labeller's recorded wall times (small cells
take seconds to a minute).

Run: ``python -m prescreen.demo --out demo_out`` (the output folder is rebuilt each run).
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from collections.abc import Sequence
from pathlib import Path

__all__ = ["main", "run_demo", "ROUND_BUDGET_CORE_HOURS"]

EXAMPLES = Path("examples") / "ferngrove"
#: The invented group's budget for this round, core-hours.
ROUND_BUDGET_CORE_HOURS = 0.3
#: Candidates drawn from the open pool as the colleague's structure search.
SEARCH_SIZE = 1500
#: Seed of that draw.
SEARCH_SEED = 7


def write_search_dump(path: Path, n: int = SEARCH_SIZE, seed: int = SEARCH_SEED) -> int:
    """Write ``n`` unlabelled open-pool monolayers as one extended XYZ file; returns n."""
    import numpy as np
    import pandas as pd
    from ase.io import write
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.acquire.rounds import data_open_dir
    from prescreen.io.atomic import replacing
    from prescreen.prototypes import structure_from_row

    folder = data_open_dir()
    pool = pd.read_parquet(folder / "pool.parquet")
    labelled = folder / "labelled.parquet"
    if labelled.is_file():
        pool = pool[~pool["id"].isin(pd.read_parquet(labelled, columns=["id"])["id"])]
    rng = np.random.default_rng(seed)
    pick = pool.iloc[np.sort(rng.choice(len(pool), size=min(n, len(pool)), replace=False))]
    frames = []
    for row in pick.to_dict("records"):
        atoms = AseAtomsAdaptor.get_atoms(structure_from_row(row))
        atoms.info["id"] = "fgs-" + row["id"].split("-", 1)[1]
        frames.append(atoms)
    path.parent.mkdir(parents=True, exist_ok=True)
    with replacing(path) as tmp:
        write(tmp, frames, format="extxyz")
    return len(frames)


def _step(text: str) -> None:
    print(f"\n== {text}", flush=True)


def run_demo(out: Path, inputs: Path = EXAMPLES, *, progress: bool = True) -> dict[str, Path]:
    """Run the whole job; returns the paths of what it wrote."""
    from prescreen.acquire import rounds
    from prescreen.campaign import Campaign
    from prescreen.cli._render import print_rejections, print_table
    from prescreen.invariants import FLOWS_DIR, INVARIANTS_FILE, read_invariants
    from prescreen.io.results import read_results
    from prescreen.io.structures import iter_candidates

    if not inputs.is_dir():
        raise FileNotFoundError(
            f"{inputs}: demo inputs not found; run from the repository root "
            "or regenerate them with `python scripts/make_demo_inputs.py`"
        )
    if out.exists():
        shutil.rmtree(out)
    campaign_dir = out / "campaign"
    written: dict[str, Path] = {"campaign": campaign_dir}
    with Campaign.create(campaign_dir, name="ferngrove-winter-screen") as campaign:
        search = out / "inputs" / "colleague_search.extxyz"
        n_search = write_search_dump(search)
        _step(f"reading candidates from {inputs} and {search} ({n_search} structures)")
        sources = [p for p in sorted(inputs.iterdir())
                   if p.name not in ("results.csv", INVARIANTS_FILE, FLOWS_DIR)] + [search]
        report = campaign.add_candidates(iter_candidates(sources), progress=progress)
        print(f"read {report.added} candidates; layer check: {report.layer_counts}; "
              f"duplicates: {report.duplicates}")
        print_rejections(report.rejections, stream=sys.stdout, campaign=str(campaign_dir))

        results = inputs / "results.csv"
        if results.is_file():
            _step(f"ingesting the group's earlier DFT results ({results})")
            ing = campaign.ingest_results(read_results(results))
            print(f"ingested {ing.added} results")
            print_rejections(ing.rejections, stream=sys.stdout)
        checks = inputs / INVARIANTS_FILE
        if checks.is_file():
            _step(f"keeping the group's Z2 checks of its hits ({checks})")
            shutil.copyfile(checks, campaign_dir / INVARIANTS_FILE)
            if (inputs / FLOWS_DIR).is_dir():  # the Wilson-loop flows the report plots
                shutil.copytree(inputs / FLOWS_DIR, campaign_dir / FLOWS_DIR)
            print(f"{len(read_invariants(checks))} candidates checked with `prescreen z2`")

        _step("training on data_open/ plus the group's results (grouped validation)")
        trained = rounds.train(campaign, progress=progress)
        print(f"{trained.version}: {trained.n_rows} rows, {trained.n_positive} positive")
        print_table([(k, f"{v:.3f}") for k, v in trained.metrics.items()
                     if k in ("roc_auc", "pr_auc", "brier", "ece")])

        _step("ranking every candidate")
        ranking = rounds.rank(campaign, progress=progress)
        written["ranking"], _ = rounds.write_ranking(ranking, out / "ranking")
        print(ranking[["rank", "formula", "probability", "uncertainty", "cost_core_hours",
                       "flags"]].head(10).to_string(float_format=lambda v: f"{v:.2f}"))

        _step(f"proposing the next batch within {ROUND_BUDGET_CORE_HOURS:g} core-hours")
        rnd = rounds.propose(campaign, budget_core_hours=ROUND_BUDGET_CORE_HOURS,
                             ranking=ranking, progress=progress)
        low, high = rnd.expected_hits_interval
        print(f"round {rnd.number}: {len(rnd.table)} candidates, {rnd.total_cost:.2f} "
              f"core-hours, expected hits {rnd.expected_hits:.2f} (90% interval {low:g}-{high:g})")
        for cid, r in rnd.table.head(15).iterrows():
            print(f"  {r['rank']:>2}. {cid:<18} {r.reason}")
        if len(rnd.table) > 15:
            print(f"  ... {len(rnd.table) - 15} more in {rnd.folder / 'proposals.csv'}")
        a = rnd.after
        print(f"after this round: {a['expected_hits_left']:.1f} expected hits left "
              f"({a['hits_left_low']:g}-{a['hits_left_high']:g}); stop rule: {a['advice']}")
        written["round"] = rnd.folder

        _step("replaying campaigns on the labelled data (discovery curves)")
        curves = rounds.replay_labelled(campaign, progress=progress)
        if curves is None:
            print(f"skipped: a replay needs at least {rounds.MIN_REPLAY_ROWS} labelled rows "
                  f"and {rounds.MIN_REPLAY_POSITIVES} positives (data_open/ is still growing)")

        _step("explaining the model and writing the allocation report")
        from prescreen.report import build_report

        report_path = build_report(campaign, out_path=out / "report.html",
                                   round_number=rnd.number, replay_curves=curves,
                                   progress=progress)
        written["report"] = report_path
    print("\ncaution: a probability is not a topological classification; confirm hits with "
          "an invariant (Z2). Toxic/radioactive flags defer to local safety rules.")
    return written


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m prescreen.demo",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path("demo_out"))
    parser.add_argument("--inputs", type=Path, default=EXAMPLES)
    parser.add_argument("--no-progress", action="store_true")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    written = run_demo(args.out, args.inputs, progress=not args.no_progress)
    from prescreen.cli.main import main as cli

    _step("campaign status")
    cli(["status", str(written["campaign"])])
    print(f"\ndemo finished in {time.perf_counter() - t0:.1f} s")
    for key, path in written.items():
        print(f"  {key}: {path}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
