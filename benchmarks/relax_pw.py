"""Benchmark: relaxation with the stress tensor (plane waves) against the LCAO one.

``relax_monolayer_pw`` relaxes positions and in-plane cell in one BFGS run with GPAW's
plane-wave stress tensor. This script relaxes monolayers of ``data_open/`` from their
pool geometry (the start every relaxation of the build has) and prints, per structure,
the lattice it finds, the lattice of the dataset's earlier LCAO relaxation (the newest
record of generation 1 or 2 in the build's checkpoint ``relax.jsonl``), the layer's
thickness (the spread of the atoms' heights) from both, the plane-wave cutoff, the BFGS
steps, the final virial and the wall time. For five layers it also
prints a published PBE plane-wave lattice constant, recalled from memory (not read):
these are the rows whose last column is filled.

Run: ``python benchmarks/relax_pw.py [--ids ID ...] [--ecut 500 700]`` (one to fifteen
minutes per structure and cutoff on one core; about 20 minutes for the default five).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import build_module  # noqa: E402

#: Published PBE lattice constants (angstrom), from memory, of layers in data_open/.
#: Silicene, germanene, stanene: buckled honeycombs; GaS; phosphorene (a, b).
PUBLISHED_FROM_MEMORY = {
    "o2d-hba-959c7ec590": "3.87",
    "o2d-hba-c8ba8da5ba": "4.06",
    "o2d-hba-f0f7e48107": "4.67",
    "o2d-gas-60fb94d4a1": "3.64",
    "o2d-pka-ad069b4b58": "3.30, 4.62",
}


def main() -> int:
    import pandas as pd

    from prescreen.physics.dft import LabelSettings, relax_monolayer_pw
    from prescreen.prototypes import structure_from_row

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", type=Path, default=ROOT / "data_open")
    p.add_argument("--ids", nargs="*", default=list(PUBLISHED_FROM_MEMORY))
    p.add_argument("--ecut", nargs="*", type=float, default=[None],
                   help="cutoffs (eV) to try; by default the one chosen by the elements")
    p.add_argument("--work", type=Path, default=ROOT / "data_work" / "open_dataset")
    args = p.parse_args()
    build = build_module()
    pool = pd.read_parquet(args.data / "pool.parquet").set_index("id")
    lcao_records: dict = {}  # the newest successful LCAO relaxation of each id
    for line in (args.work / "relax.jsonl").read_text(encoding="utf-8").splitlines():
        r = json.loads(line) if line else {}
        if r.get("status") == "ok" and int(r.get("generation", 1)) < 3:
            lcao_records[r["id"]] = r
    missing = sorted(set(args.ids) - set(pool.index))
    if missing:
        print(f"relax_pw: not in {args.data / 'pool.parquet'}: {missing}")
        return 2
    settings = LabelSettings(kpt_density=build.RELAX_KPT_DENSITY,
                             smearing_eV=build.RELAX_SMEARING_EV)
    print(f"{len(args.ids)} monolayers from their pool geometry; k density "
          f"{settings.kpt_density}, Fermi-Dirac {settings.smearing_eV} eV; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs", flush=True)
    print(f"{'id':20s} {'formula':8s} {'ecut':>5s} {'a, b start':>15s} {'a, b PW':>15s} "
          f"{'a, b LCAO':>15s} {'height PW':>9s} {'LCAO':>6s} {'steps':>5s} "
          f"{'virial eV':>9s} {'wall s':>7s} "
          f"{'PBE (memory)':>12s}", flush=True)

    def ab(s: object) -> str:
        a, b = s.lattice.abc[:2]
        return f"{a:.4f}" if abs(a - b) < 1e-6 else f"{a:.4f},{b:.4f}"

    def height(s: object) -> float:
        z = s.cart_coords[:, 2]
        return float(z.max() - z.min())

    for ident in args.ids:
        row = pool.loc[ident]
        start = structure_from_row(row)
        relaxed = (structure_from_row(lcao_records[ident]) if ident in lcao_records
                   else None)
        lcao = ab(relaxed) if relaxed is not None else "-"
        lcao_h = f"{height(relaxed):6.3f}" if relaxed is not None else f"{'-':>6s}"
        for ecut in args.ecut:
            details: dict = {}
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    after, _, ok = relax_monolayer_pw(start, settings, ecut_eV=ecut,
                                                      fmax=build.RELAX_FMAX, details=details)
                except Exception as exc:  # a benchmark reports and goes on
                    print(f"{ident:20s} failed: {exc}", flush=True)
                    continue
            wall = time.perf_counter() - t0
            print(f"{ident:20s} {row['reduced_formula']:8s} {details['ecut_eV']:5.0f} "
                  f"{ab(start):>15s} "
                  f"{ab(after):>15s} {lcao:>15s} {height(after):9.3f} {lcao_h} "
                  f"{details['steps']:5d} "
                  f"{details['virial_eV']:9.4f} {wall:7.1f} "
                  f"{PUBLISHED_FROM_MEMORY.get(ident, ''):>12s}"
                  + ("" if ok else "  (not converged)"), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
