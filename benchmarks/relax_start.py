"""Benchmark: does a universal-potential start shorten the plane-wave relaxation?

The open dataset relaxes every monolayer with plane waves and the stress tensor from the
generator's starting geometry (generation 4), a median of 5 % off in the in-plane lattice
and about ten BFGS steps away. ``benchmarks/relax_uip.py`` showed that CHGNet alone
misses the DFT lattice by a median of a few per cent, too much for labels. This script
measures the other use: CHGNet (weights in its wheel) relaxes the starting geometry first,
in seconds, within its space group, and the build's own plane-wave relaxation
(``_relaxation`` of ``scripts/build_open_dataset.py``, same settings) starts from there,
by the build's own rule (``_start_geometry``: a start that falls apart or moves an
in-plane length by more than 15 % is not used, and the relaxation is the recorded one).
For each structure it relaxes again from the start the record did not use (the
potential's, for a record that started at the pool geometry, and the other way round)
and prints

* the relaxation from the pool geometry (BFGS steps, wall time),
* the potential's time and the relaxation from its start (BFGS steps, wall time of the
  DFT part),
* how far the two DFT results lie apart: the larger relative difference of the in-plane
  lengths, and the largest difference of an atom's Cartesian position after the cells
  are matched (fractional coordinates on the cell relaxed from the pool geometry),
* where both relaxations have an energy (records since 2026-12-03) on the same k mesh,
  the energy difference,

and a summary. Two results more than ``SAME_MINIMUM_LATTICE`` apart in the lattice, or
``SAME_MINIMUM_POSITION`` in a position, count as different minima. Wall times depend on
the load of the machine: the recorded ones ran beside a second build worker on two
cores; compare steps first.

Needs the ``dft`` and ``uip`` extras (``make dataset-env``). Run:
``python benchmarks/relax_start.py ID [ID ...] [--work data_work/open_dataset]``
(minutes per structure: it runs DFT).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from _build import build_module, plane_wave_relaxations  # noqa: E402

#: Two DFT geometries whose in-plane lengths differ by more than this (relative) are
#: taken as different minima: ten times the relaxation's virial tolerance in strain,
#: roughly (common practice, our choice).
SAME_MINIMUM_LATTICE = 0.01
#: ... or whose atoms differ by more than this in position (Angstrom; our choice).
SAME_MINIMUM_POSITION = 0.05


def apart(a, b) -> tuple[float, float]:
    """Larger relative difference of the in-plane lengths and the largest position
    difference (Angstrom, fractional coordinates on ``a``'s cell, nearest image)."""
    import numpy as np

    la, lb = np.array(a.lattice.abc[:2]), np.array(b.lattice.abc[:2])
    d_lat = float(np.max(np.abs(lb / la - 1)))
    df = np.array(b.frac_coords) - np.array(a.frac_coords)
    df -= np.rint(df)
    d_pos = float(np.max(np.linalg.norm(df @ a.lattice.matrix, axis=1)))
    return d_lat, d_pos


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("ids", nargs="+")
    p.add_argument("--work", type=Path, default=REPO / "data_work" / "open_dataset")
    p.add_argument("--pool", type=Path, default=REPO / "data_open" / "pool.parquet")
    p.add_argument("--out", type=Path, default=None,
                   help="append the new relaxation records here (JSON lines)")
    args = p.parse_args()
    import numpy as np
    import pandas as pd

    from prescreen.physics.prerelax import MissingPotential, potential_name
    from prescreen.prototypes import structure_from_row

    try:
        potential_name()
    except MissingPotential as exc:
        print(f"relax_start: {exc}")
        return 2
    warnings.filterwarnings("ignore")
    build = build_module()
    records = plane_wave_relaxations(args.work, args.ids, "relax_start")
    if records is None:
        return 2
    pool = pd.read_parquet(args.pool).set_index("id")
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs; the recorded "
          "relaxation against one from the other start")
    print(f"{'id':22s} {'from the pool':>13s} {'potential':>9s} {'from there':>13s} "
          f"{'d lattice':>10s} {'d pos A':>8s}  note")
    rows = []
    for ident in args.ids:
        rec = records[ident]
        recorded_from_pool = rec.get("start", "generated").startswith("generated")
        if recorded_from_pool:  # the potential's start, by the build's rule
            payload = {**pool.loc[ident].to_dict(), "start": "potential"}
            _, started = build._start_geometry(structure_from_row(payload), "potential")
            if started["start"].startswith("generated"):  # the same relaxation as recorded
                print(f"{ident:22s} {rec['bfgs_steps']:4d} {rec['wall_s']:7.0f} s "
                      f"{started.get('start_s', 0):9.1f} {'':>13s} {'':>10s} {'':>8s}  "
                      f"start not used: {started['start']}")
                rows.append((rec["bfgs_steps"], rec["wall_s"], started.get("start_s", 0.0),
                             rec["bfgs_steps"], rec["wall_s"], 0.0, True, False))
                continue
        else:
            payload = {**pool.loc[ident].to_dict(), "start": "generated"}
        new, _ = build._relaxation(ident, payload, build.RELAX_KPT_DENSITY)
        if args.out is not None:
            build._append_jsonl(args.out, new)
        from_pool, from_potential = (rec, new) if recorded_from_pool else (new, rec)
        pool_cols = (f"{from_pool['bfgs_steps']:4d} {from_pool['wall_s']:7.0f} s"
                     if "bfgs_steps" in from_pool else f"{'':>13s}")
        head = f"{ident:22s} {pool_cols} {from_potential.get('start_s', 0):9.1f}"
        if new["status"] != "ok":
            print(f"{head} {'':>13s} {'':>10s} {'':>8s}  new relaxation {new['status']}: "
                  f"{new['reason']}")
            rows.append((None,) * 8)
            continue
        d_lat, d_pos = apart(structure_from_row(from_pool), structure_from_row(from_potential))
        same = d_lat <= SAME_MINIMUM_LATTICE and d_pos <= SAME_MINIMUM_POSITION
        energy = ""
        if "energy_eV" in rec and rec.get("relax_kmesh") == new.get("relax_kmesh"):
            energy = (f"; energy from the potential's start "
                      f"{from_potential['energy_eV'] - from_pool['energy_eV']:+.4f} eV per cell")
        pot_wall = from_potential["wall_s"] - from_potential["start_s"]
        print(f"{head} {from_potential['bfgs_steps']:4d} {pot_wall:7.0f} s "
              f"{100 * d_lat:9.2f}% {d_pos:8.3f}  "
              f"{'same minimum' if same else 'ANOTHER MINIMUM'}: a, b {from_pool['a_A']:.3f}, "
              f"{from_pool['b_A']:.3f} from the pool, {from_potential['a_A']:.3f}, "
              f"{from_potential['b_A']:.3f} A from the potential's start{energy}")
        rows.append((from_pool["bfgs_steps"], from_pool["wall_s"], from_potential["start_s"],
                     from_potential["bfgs_steps"], pot_wall, d_lat, same, True))
    done = [r for r in rows if r[0] is not None]
    if done:
        a = np.array([r[:5] for r in done], dtype=float)
        used = sum(r[7] for r in done)
        print(f"\nsummary over {len(done)} of {len(rows)} structures ({used} started from the "
              f"potential, {len(done) - used} where its start was not used): BFGS steps "
              f"{a[:, 0].sum():.0f} -> {a[:, 3].sum():.0f} "
              f"({100 * (a[:, 3].sum() / a[:, 0].sum() - 1):+.0f} %), wall "
              f"{a[:, 1].sum():.0f} s -> {a[:, 4].sum() + a[:, 2].sum():.0f} s including "
              f"{a[:, 2].sum():.0f} s of the potential; same minimum: "
              f"{sum(bool(r[6]) for r in done)} of {len(done)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
