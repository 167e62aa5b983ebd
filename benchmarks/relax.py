"""Benchmark: cost of one open-dataset relaxation, and what cheaper settings change.

Relaxes generated monolayers with the open dataset's relaxation settings (LCAO dzp PBE,
k-point density 2.5, Fermi-Dirac 0.1 eV, BFGS to 0.05 eV/A, in-plane scale scan) and,
for comparison, with a coarser real-space grid and a looser density tolerance; prints
wall time, the relaxed lattice constant and the residual force of each, so that a
cheaper setting is adopted only if it keeps the geometry.

Run: ``python benchmarks/relax.py [--prototype MX2-1T --decoration M=Ti,X=S]`` (minutes).
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

VARIANTS = {
    "dataset settings": {},
    "pre-relax on k density 1.25": {"pre_relax_kpt_density": 1.25},
    "pre-relax k 1.25, szp(dzp)": {"pre_relax_kpt_density": 1.25,
                                   "pre_relax_basis": "szp(dzp)"},
    "h 0.25 A, density tol 1e-3": {"grid_spacing_A": 0.25, "scf_density_tol": 1e-3},
}


def main() -> None:
    from prescreen.physics.dft import LabelSettings, relax_monolayer
    from prescreen.prototypes import build_structure

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--prototype", default="MX2-1T")
    p.add_argument("--decoration", default="M=Ti,X=S")
    p.add_argument("--only", nargs="*", default=None, help="run only these variants")
    args = p.parse_args()
    deco = dict(item.split("=") for item in args.decoration.split(","))
    structure = build_structure(args.prototype, deco)
    settings = LabelSettings(kpt_density=2.5, smearing_eV=0.1)
    print(f"{args.prototype} {deco}: {len(structure)} atoms; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    for label, extra in VARIANTS.items():
        if args.only and label not in args.only:
            continue
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            relaxed, fmax, ok = relax_monolayer(structure, settings, fmax=0.05, steps=60,
                                                scales=(0.90, 0.95, 1.00, 1.05, 1.10), **extra)
        print(f"  {label:<28} {time.perf_counter() - t0:7.1f} s   a = {relaxed.lattice.a:.4f} A"
              f"   residual {fmax:.3f} eV/A   converged {ok}")


if __name__ == "__main__":
    main()
