"""Benchmark the two DFT routes to Z2: parity eigenvalues and Wilson loops.

For a few small monolayers built with ASE, runs
:func:`~prescreen.physics.parity.z2_from_parities` where the layer has an inversion
centre and :func:`~prescreen.physics.wilson.z2_from_wilson_loops` on every layer, with
the default :class:`~prescreen.physics.dft.LabelSettings`, and prints for each: Z2, wall
time, the k points per Wilson loop that were needed, the number of loops, the smallest
link singular value, and whether the two routes agree. One process, one thread; the
load average is printed with the figures because a busy machine stretches them.

Geometries are approximate (from memory, as in tests/test_dft.py): the point is cost and
agreement of the two routes, not the numbers of a converged study. Run::

    .venv/bin/python benchmarks/z2.py [--only NAME ...]
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

# name -> builder; geometries from memory (see tests/test_dft.py, tests/test_parity.py)
LAYERS = {
    "Bi2-buckled": lambda h, mx2: h("Bi2", 4.33, 1.73),
    "Sn2-buckled": lambda h, mx2: h("Sn2", 4.67, 0.85),
    "HfS2-1T": lambda h, mx2: mx2("HfS2", "1T", a=3.63, thickness=2.9, vacuum=8.0),
    "MoS2-2H": lambda h, mx2: mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=8.0),
    "WSe2-2H": lambda h, mx2: mx2("WSe2", "2H", a=3.32, thickness=3.34, vacuum=8.0),
}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="*", default=None, choices=sorted(LAYERS))
    args = parser.parse_args(argv)

    from ase.build import mx2

    from prescreen.errors import InputError, LabellingError
    from prescreen.physics.dft import LabelSettings, honeycomb_monolayer
    from prescreen.physics.parity import z2_from_parities
    from prescreen.physics.wilson import z2_from_wilson_loops

    settings = LabelSettings()
    print(f"prescreen Z2 benchmark (load average at start {os.getloadavg()[0]:.2f}, "
          f"{os.cpu_count()} CPUs, one thread)")
    print(f"{'layer':<13} {'parity':>8} {'s':>6}   {'Wilson':>8} {'s':>6} {'k/loop':>6} "
          f"{'loops':>5} {'link':>5}  agree")
    for name, build in LAYERS.items():
        if args.only and name not in args.only:
            continue
        atoms = build(honeycomb_monolayer, mx2)
        t0 = time.perf_counter()
        try:
            p = z2_from_parities(atoms, settings, id=name)
            par, par_s = str(p.z2), f"{time.perf_counter() - t0:.1f}"
        except (InputError, LabellingError) as exc:
            par, par_s = ("no inv." if "inversion" in str(exc) else "refused"), "-"
        t0 = time.perf_counter()
        try:
            w = z2_from_wilson_loops(atoms, settings, id=name)
            wil, wil_s = str(w.z2), f"{time.perf_counter() - t0:.1f}"
            extra = f"{w.nk1:>6} {len(w.k2):>5} {w.min_link:>5.2f}"
        except (InputError, LabellingError) as exc:
            wil, wil_s, extra = "refused", "-", f"{'':>6} {'':>5} {'':>5}"
            print(f"  ({name}: {exc})")
        agree = "yes" if par == wil else ("-" if not par.isdigit() else "NO")
        print(f"{name:<13} {par:>8} {par_s:>6}   {wil:>8} {wil_s:>6} {extra}  {agree}",
              flush=True)
    print(f"load average at end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
