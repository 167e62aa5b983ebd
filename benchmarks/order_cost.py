"""Benchmark: what the build's order of candidates costs, per label.

Reads the build's checkpoints (``data_work/open_dataset``: ``relax.jsonl`` and
``labels/records.jsonl``) and the pool (``data_open/pool.parquet``).

1. Fits the wall time of the plane-wave relaxations of generation 4 that ended ok and
   started from the pool geometry, and of
   the labels of those geometries, to ``log t = c + p log(n_atoms) + log(h) [N, O or F]``,
   once with ``p`` free and once with ``p = 2`` (the form behind the build's
   ``HARD_COST_FACTOR``), and prints c, p, h and the scatter.
2. Takes the next ``--next`` candidates not yet relaxed in two orders of the same pool and
   seed: equal turns per prototype (how the build chose its first
   ``EQUAL_TURNS_RELAXED`` structures) and the
   cost-weighted turns of ``stratified_order``. For each it prints the predicted
   core-hours (relaxation + label, from fit 1), labels per core-hour, the prototypes
   and elements covered, and the spread of cell sizes.
3. Measures the same for the new structures the build relaxed with generation 4 before
   and after the order changed (the first ``EQUAL_TURNS_RELAXED`` ids of
   ``relax.jsonl`` came with equal turns), so that the prediction can be checked.

4. Compares the generation-4 relaxations by where they started (the pool geometry, the
   potential's start, or the pool geometry because the potential's was refused): wall
   time against the relaxation fit of part 1, which is fitted to the starts at the pool
   geometry only, so that different cell sizes compare.
5. Measures the route of the potential alone (generation 0, ``--relax-with
   potential``): its relaxations by status, and for new structures and for those that
   replaced an earlier DFT geometry the core-hours (relaxation + label) and labels per
   core-hour, next to part 3's.

The prediction is a fit to a few dozen jobs, not a measurement of the orders: it
ranks them, and part 3 checks it as the build goes on.

Run: ``python benchmarks/order_cost.py [--next 200] [--work data_work/open_dataset]``
(seconds).
"""

from __future__ import annotations

import argparse
import math
import sys
from collections import Counter
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from _build import build_module  # noqa: E402

GENERATION = 4  # the build's RELAX_GENERATION


def fit(n_atoms: np.ndarray, hard: np.ndarray, wall: np.ndarray,
        exponent: float | None) -> tuple[float, float, float, float]:
    """Least squares of log(wall) on log(n_atoms) and the hard-element flag:
    (c, p, h, rms of the log residual); ``exponent`` fixes p."""
    y = np.log(wall)
    if exponent is None:
        x = np.c_[np.ones_like(y), np.log(n_atoms), hard]
        coef, *_ = np.linalg.lstsq(x, y, rcond=None)
        c, p, logh = coef
    else:
        x = np.c_[np.ones_like(y), hard]
        coef, *_ = np.linalg.lstsq(x, y - exponent * np.log(n_atoms), rcond=None)
        (c, logh), p = coef, exponent
    rms = float(np.sqrt(np.mean((y - (c + p * np.log(n_atoms) + logh * hard)) ** 2)))
    return float(c), float(p), float(np.exp(logh)), rms


def main() -> int:
    import pandas as pd

    from prescreen.physics.labeller import record_lines

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--work", type=Path, default=REPO / "data_work" / "open_dataset")
    ap.add_argument("--pool", type=Path, default=REPO / "data_open" / "pool.parquet")
    ap.add_argument("--next", type=int, default=200, help="candidates to predict")
    args = ap.parse_args()
    build = build_module()
    pool = pd.read_parquet(args.pool)
    rows = pool.set_index("id")
    relax_log = build._read_jsonl(args.work / "relax.jsonl")
    relax = build._newest(relax_log)
    labels = {d["id"]: d for d in record_lines(args.work / "labels")
              if d.get("status") == "ok"}
    every_ok = [r for r in relax.values() if r.get("generation") == GENERATION
                and r["status"] == "ok" and r["id"] in rows.index]
    # the cost model is fitted to relaxations from the pool geometry; part 4 compares
    # those that started from the potential's geometry with it
    ok = [r for r in every_ok if r.get("start", "generated").startswith("generated")]
    if len(ok) < 5:
        print(f"only {len(ok)} generation-{GENERATION} relaxations that ended ok in "
              f"{args.work / 'relax.jsonl'}: too few to fit")
        return 2

    def hard_flag(ids: list[str]) -> np.ndarray:
        return np.array([bool(build.HARD_ELEMENTS & set(rows.at[i, "elements"].split()))
                         for i in ids], dtype=float)

    models = {}
    for kind, recs in (("relaxation", ok),
                       ("label", [labels[r["id"]] for r in ok if r["id"] in labels])):
        ids = [r["id"] for r in recs]
        n = rows.loc[ids, "n_atoms"].to_numpy(dtype=float)
        wall = np.array([float(r["wall_s"]) for r in recs])
        print(f"{kind} wall time, {len(ids)} jobs: median {np.median(wall):.0f} s, "
              f"total {wall.sum() / 3600:.2f} core-h")
        hard = hard_flag(ids)
        for exponent in (None, 2.0):
            models[kind] = c, p, h, rms = fit(n, hard, wall, exponent)
            print(f"  fit {'p free ' if exponent is None else 'p fixed'}: t = {np.exp(c):.2f} s"
                  f" x n_atoms^{p:.2f} x {h:.2f} [N, O or F]; rms of log t {rms:.2f}")
        # the predictions below use the last fit, p fixed at 2
    print(f"build: HARD_COST_FACTOR {build.HARD_COST_FACTOR}")

    done = set(relax)
    orders = {
        "equal turns": build.stratified_order(pool, build.DEFAULT_SEED,
                                              weight=lambda n, e: 1.0),
        "cost-weighted turns": build.stratified_order(pool, build.DEFAULT_SEED),
    }
    print(f"\nnext {args.next} candidates not yet relaxed ({len(done)} relaxed so far):")
    print(f"{'order':22s} {'core-h':>7s} {'labels/core-h':>14s} {'prototypes':>11s} "
          f"{'elements':>9s} {'atoms median':>13s} {'<=3 atoms':>10s}")
    for name, order in orders.items():
        nxt = [i for i in order if i not in done][:args.next]
        n = rows.loc[nxt, "n_atoms"].to_numpy(dtype=float)
        hard = hard_flag(nxt)
        seconds = sum(np.exp(c) * n ** p * h ** hard for c, p, h, _ in models.values())
        hours = float(seconds.sum()) / 3600
        elements = {e for i in nxt for e in rows.at[i, "elements"].split()}
        print(f"{name:22s} {hours:7.1f} {len(nxt) / hours:14.1f} "
              f"{rows.loc[nxt, 'prototype'].nunique():11d} {len(elements):9d} "
              f"{np.median(n):13.0f} {int((n <= 3).sum()):10d}")

    # measured: new structures (first relaxation of generation 4, not an upgrade) chosen
    # before and after the order changed, with the wall time of their label
    first_seen = list(dict.fromkeys(r["id"] for r in relax_log))
    before = set(first_seen[:build.EQUAL_TURNS_RELAXED])
    print("\nmeasured, new structures relaxed with generation 4 (relaxation + label; "
          "any status):")
    for name, chosen in (("equal turns", lambda i: i in before),
                         ("cost-weighted turns", lambda i: i not in before)):
        new = [r for r in relax.values() if r.get("generation") == GENERATION
               and "replaced_generation" not in r and chosen(r["id"])]
        hours = sum(float(r["wall_s"]) + float(labels.get(r["id"], {}).get("wall_s", 0.0))
                    for r in new) / 3600
        n_labels = sum(r["id"] in labels for r in new)
        rate = f"{n_labels / hours:.1f}" if hours else "n/a"
        print(f"{name:22s} {len(new):4d} structures, {n_labels:4d} labels, "
              f"{hours:6.2f} core-h, {rate} labels per core-hour")

    # measured: relaxations by their start, against the relaxation model of part 1 (fitted
    # to starts at the pool geometry), so that cells of different sizes compare
    c, p, h, _ = models["relaxation"]
    print("\nmeasured, generation-4 relaxations that ended ok, by start (wall time against "
          "the relaxation fit, p fixed):")
    groups = (("pool geometry", lambda s: s == "generated"),
              ("potential's start refused", lambda s: s.startswith("generated;")),
              ("potential's start", lambda s: not s.startswith("generated")))
    for name, member in groups:
        recs = [r for r in every_ok if member(r.get("start", "generated"))]
        if not recs:
            print(f"{name:26s}    0 relaxations")
            continue
        ids = [r["id"] for r in recs]
        n = rows.loc[ids, "n_atoms"].to_numpy(dtype=float)
        predicted = np.exp(c) * n ** p * h ** hard_flag(ids)
        wall = np.array([float(r["wall_s"]) for r in recs])
        steps = np.array([float(r.get("bfgs_steps", 0)) for r in recs])
        print(f"{name:26s} {len(recs):4d} relaxations, {wall.sum() / 3600:5.2f} core-h, "
              f"measured/predicted: total {wall.sum() / predicted.sum():.2f}, median "
              f"{np.median(wall / predicted):.2f}; median {np.median(steps):.0f} BFGS steps")

    # measured: the potential alone, whose labels come from the label log's records
    # after its relaxation (an upgraded id's newest label is of its newest geometry)
    mine = [r for r in relax.values() if r.get("generation") == build.POTENTIAL_GENERATION]
    print(f"\nmeasured, the potential alone (generation {build.POTENTIAL_GENERATION}): "
          f"{len(mine)} relaxations, "
          + (", ".join(f"{k} {v}" for k, v in sorted(Counter(r['status'] for r in mine)
                                                      .items())) or "none"))
    for name, member in (("new structures", lambda r: "replaced_generation" not in r),
                         ("replaced a DFT geometry", lambda r: "replaced_generation" in r)):
        recs = [r for r in mine if member(r)]
        hours = sum(float(r["wall_s"]) + float(labels.get(r["id"], {}).get("wall_s", 0.0))
                    for r in recs) / 3600
        n_labels = sum(r["id"] in labels for r in recs if r["status"] == "ok")
        rate = f"{n_labels / hours:.1f}" if hours else "n/a"
        wall = [float(r["wall_s"]) for r in recs]
        print(f"{name:26s} {len(recs):4d} structures, {n_labels:4d} labels, {hours:6.2f} "
              f"core-h, {rate} labels per core-hour; median "
              f"{np.median(wall) if wall else math.nan:.1f} s to relax")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
