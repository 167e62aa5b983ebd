"""Benchmark the DFT spillage labeller on small monolayers built with ASE.

Labels 26 two- and three-atom monolayers (honeycombs and MX2 in 2H and 1T forms) with the
default :class:`~prescreen.physics.dft.LabelSettings` (LCAO dzp, PBE, Gamma-centred mesh
from the default k density, non-self-consistent SOC) through
:func:`~prescreen.physics.labeller.run_labelling`, then prints each structure's wall
time, the median, and monolayers per core-hour.

The geometries are approximate (lattice constants and layer heights from memory, not
relaxed); the point is the cost, not the labels. Run::

    .venv/bin/python benchmarks/label.py [--workers 2] [--out DIR]

Rerunning with the same ``--out`` resumes (finished structures are not recomputed, and
their recorded wall times are reported).
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

# (id, formula, a [A], buckling [A]) -- approximate values, from memory.
HONEYCOMBS = [
    ("graphene", "C2", 2.46, 0.0),
    ("hBN", "BN", 2.50, 0.0),
    ("silicene", "Si2", 3.87, 0.44),
    ("germanene", "Ge2", 4.06, 0.68),
    ("stanene", "Sn2", 4.67, 0.85),
    ("bismuthene-buckled", "Bi2", 4.33, 1.73),
    ("antimonene", "Sb2", 4.12, 1.65),
    ("arsenene", "As2", 3.61, 1.40),
    ("blue-phosphorene", "P2", 3.33, 1.24),
    ("AlN", "AlN", 3.13, 0.0),
    ("GaN", "GaN", 3.20, 0.0),
    ("SiC", "SiC", 3.10, 0.0),
    ("ZnO", "ZnO", 3.29, 0.0),
    ("BP", "BP", 3.21, 0.0),
    ("GaAs", "GaAs", 3.97, 0.55),
    ("InSb", "InSb", 4.57, 0.75),
]

# (id, formula, kind, a [A], chalcogen-chalcogen height [A]) -- approximate, from memory.
DICHALCOGENIDES = [
    ("MoS2-2H", "MoS2", "2H", 3.18, 3.13),
    ("MoSe2-2H", "MoSe2", "2H", 3.32, 3.34),
    ("WS2-2H", "WS2", "2H", 3.18, 3.14),
    ("WSe2-2H", "WSe2", "2H", 3.32, 3.35),
    ("MoTe2-2H", "MoTe2", "2H", 3.55, 3.60),
    ("NbSe2-2H", "NbSe2", "2H", 3.45, 3.36),
    ("TiS2-1T", "TiS2", "1T", 3.40, 2.85),
    ("SnS2-1T", "SnS2", "1T", 3.69, 2.95),
    ("ZrS2-1T", "ZrS2", "1T", 3.68, 2.90),
    ("PtSe2-1T", "PtSe2", "1T", 3.75, 2.53),
]


def build_jobs():
    """The benchmark structures as ``(id, ase.Atoms)`` pairs."""
    from ase.build import mx2

    from prescreen.physics.dft import honeycomb_monolayer

    jobs = [(i, honeycomb_monolayer(f, a, b)) for i, f, a, b in HONEYCOMBS]
    jobs += [(i, mx2(f, kind, a=a, thickness=t, vacuum=7.5))
             for i, f, kind, a, t in DICHALCOGENIDES]
    return jobs


def main(argv: list[str] | None = None) -> int:
    """Label the benchmark set and print timings."""
    from prescreen.physics.dft import LabelSettings
    from prescreen.physics.labeller import load_records, run_labelling

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--timeout", type=float, default=1800.0, help="seconds per structure")
    parser.add_argument("--out", type=Path, default=None, help="output folder (resumable)")
    args = parser.parse_args(argv)

    out = args.out or Path(tempfile.mkdtemp(prefix="prescreen-label-bench-"))
    jobs = build_jobs()
    t0 = time.perf_counter()
    summary = run_labelling(jobs, out, settings=LabelSettings(), workers=args.workers,
                            timeout_s=args.timeout)
    wall = time.perf_counter() - t0
    order = {i: n for n, (i, _) in enumerate(jobs)}
    atoms_of = {i: len(a) for i, a in jobs}
    records = sorted((r for r in load_records(out) if r.id in order), key=lambda r: order[r.id])

    print(f"output folder: {out}")
    print(f"{'id':<20} {'atoms':>5} {'mesh':>7} {'spillage':>8} {'k_max':>16} "
          f"{'gap':>6} {'gapSOC':>6} {'metal':>5} {'wall_s':>7} {'cpu_s':>7}")
    for r in records:
        if not r.ok:
            print(f"{r.id:<20} {atoms_of[r.id]:>5} FAILED after {r.wall_s:.1f} s: {r.error}")
            continue
        mesh = "x".join(map(str, r.settings["kmesh"][:2]))
        k = "(" + ",".join(f"{x:+.2f}" for x in r.k_max[:2]) + ")"
        print(f"{r.id:<20} {atoms_of[r.id]:>5} {mesh:>7} {r.spillage:8.3f} {k:>16} "
              f"{r.gap_nosoc_eV:6.2f} {r.gap_soc_eV:6.2f} {str(r.is_metal):>5} {r.wall_s:7.1f} "
              f"{r.cpu_s:7.1f}")
    ok = [r for r in records if r.ok]
    walls = [r.wall_s for r in ok]
    if not walls:
        print("no successful calculation")
        return 1
    core_h = sum(r.core_hours for r in ok)
    by_size = {}
    for r in ok:
        by_size.setdefault(atoms_of[r.id], []).append(r.wall_s)
    print(f"\nlabelled {len(ok)} of {len(records)} structures "
          f"({summary.n_skipped} resumed from an earlier run)")
    print(f"median wall time per structure: {statistics.median(walls):.1f} s "
          f"(min {min(walls):.1f}, max {max(walls):.1f})")
    for n, w in sorted(by_size.items()):
        print(f"  {n}-atom cells: {len(w)} structures, median {statistics.median(w):.1f} s, "
              f"{3600.0 / statistics.mean(w):.0f} per core-hour")
    cpu = [r.cpu_s for r in ok]
    print(f"monolayers per core-hour (all): {len(ok) / core_h:.0f} "
          f"({core_h:.3f} core-hours in total, one core per calculation)")
    print(f"CPU time per structure: median {statistics.median(cpu):.1f} s; "
          f"monolayers per CPU-hour {3600.0 * len(ok) / sum(cpu):.0f} "
          "(equals the per-core-hour figure on an otherwise idle machine)")
    try:
        load = os.getloadavg()[0]
        print(f"load average at the end: {load:.1f} on {os.cpu_count()} cores "
              "(wall times grow when other work shares the cores)")
    except OSError:
        pass
    if summary.n_skipped == 0:
        print(f"wall clock for the whole set with {args.workers} workers: {wall:.0f} s "
              f"= {3600.0 * len(ok) / wall:.0f} monolayers per hour on this machine")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
