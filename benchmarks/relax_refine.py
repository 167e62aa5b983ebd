"""Benchmark: how far from zero in-plane stress are the lattices of a scan alone?

Until 2026-12-03 the open dataset took its lattice from scans with the positions held
fractional (a coarse scan, then a three-point fine scan), which bias the minimum toward
the lattice at which those positions were relaxed. This script starts from relaxed
structures in ``data_open/labelled.parquet``, refines their lattice to zero in-plane
stress at the same level of theory (``relax_monolayer(..., refine_only=True)``, the
dataset's relaxation settings) and prints, per structure, the lattice before and after,
the change, the cycles and energies it took and the wall time.

Run: ``python benchmarks/relax_refine.py [--ids ID ...] [--max-atoms 4] [--limit 6]``
(minutes per structure; one core).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import build_module  # noqa: E402

#: BFGS steps per position relaxation of the dataset's generation-2 relaxations.
GENERATION2_STEPS = 60


def main() -> int:
    import numpy as np
    import pandas as pd

    from prescreen.physics.dft import LabelSettings, relax_monolayer
    from prescreen.prototypes import structure_from_row

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", type=Path, default=ROOT / "data_open")
    p.add_argument("--ids", nargs="*", default=None)
    p.add_argument("--max-atoms", type=int, default=4)
    p.add_argument("--limit", type=int, default=6, help="structures, when --ids is not given")
    args = p.parse_args()
    build = build_module()
    table = pd.read_parquet(args.data / "labelled.parquet")
    if args.ids:
        missing = sorted(set(args.ids) - set(table["id"]))
        if missing:
            print(f"relax_refine: not in {args.data / 'labelled.parquet'}: {missing}")
            return 2
        rows = table.set_index("id").loc[args.ids].reset_index()
    else:  # one structure per prototype, smallest cells first
        small = table[table["n_atoms"] <= args.max_atoms].sort_values(["n_atoms", "id"])
        rows = small.groupby("prototype").head(1).head(args.limit)
    settings = LabelSettings(kpt_density=build.RELAX_KPT_DENSITY,
                             smearing_eV=build.RELAX_SMEARING_EV)
    print(f"{len(rows)} relaxed monolayers from {args.data}; k density "
          f"{settings.kpt_density}, Fermi-Dirac {settings.smearing_eV} eV; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs", flush=True)
    print(f"{'id':20s} {'formula':9s} {'prototype':22s} {'a, b before':>15s} "
          f"{'a, b after':>15s} {'change %':>12s} {'cycles':>6s} {'energies':>8s} "
          f"{'wall s':>7s}", flush=True)
    changes = []
    for _, row in rows.iterrows():
        before = structure_from_row(row)
        details: dict = {}
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            after, _, ok = relax_monolayer(before, settings, fmax=build.RELAX_FMAX,
                                           steps=GENERATION2_STEPS, refine_only=True,
                                           details=details)
        wall = time.perf_counter() - t0
        ab0 = np.array(before.lattice.abc[:2])
        ab1 = np.array(after.lattice.abc[:2])
        change = 100 * (ab1 / ab0 - 1)
        changes.append(float(np.max(np.abs(change))))
        print(f"{row['id']:20s} {row['reduced_formula']:9s} {row['prototype']:22s} "
              f"{ab0[0]:7.4f} {ab0[1]:7.4f} {ab1[0]:7.4f} {ab1[1]:7.4f} "
              f"{change[0]:+6.2f} {change[1]:+5.2f} {details['lattice_cycles']:6d} "
              f"{details['lattice_energies']:8d} {wall:7.1f}"
              + ("" if ok else "  (not converged)"), flush=True)
    if changes:
        print(f"largest change per structure: median {np.median(changes):.2f} %, "
              f"max {np.max(changes):.2f} %; above 1 %: {sum(c > 1 for c in changes)} of "
              f"{len(changes)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
