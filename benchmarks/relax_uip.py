"""Benchmark: would a universal interatomic potential do instead of the DFT relaxation?

The open dataset relaxes every monolayer with the labeller's functional (GPAW PBE; LCAO
dzp until 2026-12-03, plane waves with the stress tensor since), which costs minutes per
structure and bounds how many labels a machine makes.
A universal potential would take seconds. This script measures what it would change:
it relaxes the *starting* geometry of every labelled monolayer in ``data_open/`` with
CHGNet (weights ship in its wheel; in-plane cell and positions, ASE's FrechetCellFilter
with the out-of-plane components masked, FIRE to 0.02 eV/A) and prints, per structure,
the in-plane lattice against the DFT-relaxed one, plus a summary: median and largest
relative difference, how many land within 1 % and 2 %, and how many changed phase
(more than 10 % off, or no longer one bonded sheet).

The potential is free to change the in-plane cell shape (xx, yy, xy strain), as the
plane-wave relaxation is; the earlier LCAO relaxation scaled the cell isotropically (the
"changed phase" cases, measured against those, are near-isotropic changes). CHGNet's
weights were fitted by its authors to relaxations of another project's database; only
geometries computed here are compared, nothing of it enters ``data_open/``.

Needs the optional extra: ``pip install -e .[uip]`` (CHGNet and PyTorch, about
1 GB with a CPU build of torch 2.13.0; PyPI's default Linux build of torch pulls in CUDA
libraries of several GB; neither is needed anywhere else in prescreen). It compares every
labelled structure in ``--data``.

Run: ``python benchmarks/relax_uip.py [--data data_open]`` (about a minute).
"""

from __future__ import annotations

import argparse
import os
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

#: Relative in-plane lattice change (dimensionless) above which the potential is taken
#: to have moved the layer into another phase (common practice for "it collapsed").
PHASE_CHANGE = 0.10


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", type=Path, default=Path("data_open"))
    p.add_argument("--fmax", type=float, default=0.02, help="eV/A")
    p.add_argument("--steps", type=int, default=500)
    args = p.parse_args()
    try:
        import torch
        from chgnet.model import CHGNet
        from chgnet.model.dynamics import CHGNetCalculator
    except ImportError as exc:
        print(f"relax_uip: needs the 'uip' extra (pip install -e .[uip]): {exc}")
        return 2
    import numpy as np
    import pandas as pd
    from ase.filters import FrechetCellFilter
    from ase.optimize import FIRE
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.prototypes import check_intact_monolayer, structure_from_row

    warnings.filterwarnings("ignore")
    torch.set_num_threads(1)
    labelled = pd.read_parquet(args.data / "labelled.parquet")
    pool = pd.read_parquet(args.data / "pool.parquet").set_index("id")
    calc = CHGNetCalculator(model=CHGNet.load(verbose=False), use_device="cpu")
    print(f"{len(labelled)} DFT-relaxed monolayers from {args.data}; CHGNet; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    print(f"{'id':22s} {'formula':10s} {'start a':>8s} {'DFT a, b':>15s} {'CHGNet a, b':>15s} "
          f"{'diff':>7s} {'s':>5s}  note")
    diffs, times, changed = [], [], 0
    for row in labelled.itertuples():
        start = pool.loc[row.id]
        atoms = AseAtomsAdaptor.get_atoms(structure_from_row({
            "lattice": list(start["lattice"]), "species": list(start["species"]),
            "frac_coords": list(start["frac_coords"])}))
        atoms.calc = calc
        t0 = time.perf_counter()
        opt = FIRE(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), logfile=None)
        converged = opt.run(fmax=args.fmax, steps=args.steps)
        times.append(time.perf_counter() - t0)
        a, b = atoms.cell.lengths()[:2]
        # the larger relative change of the two in-plane lengths
        d = max(a / row.a_A - 1, b / row.b_A - 1, key=abs)
        diffs.append(d)
        intact, why = check_intact_monolayer(AseAtomsAdaptor.get_structure(atoms))
        notes = [] if converged else [f"not converged in {args.steps} steps"]
        if abs(d) > PHASE_CHANGE or not intact:
            changed += 1
            notes.append("changed phase" + ("" if intact else f" ({why})"))
        a0 = float(np.linalg.norm(np.asarray(start["lattice"])[:3]))
        print(f"{row.id:22s} {row.reduced_formula:10s} {a0:8.3f} {row.a_A:7.3f},{row.b_A:7.3f} "
              f"{a:7.3f},{b:7.3f} {100 * d:+6.1f}% {times[-1]:5.1f}  {'; '.join(notes)}")
    d = np.abs(np.array(diffs))
    print(f"\nsummary over {len(d)} structures: median |diff| {100 * np.median(d):.1f} %, "
          f"largest {100 * d.max():.1f} %; within 1 %: {int((d <= 0.01).sum())}, "
          f"within 2 %: {int((d <= 0.02).sum())}; changed phase: {changed}; "
          f"median {np.median(times):.1f} s per relaxation")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
