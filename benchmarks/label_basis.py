"""Benchmark: the spillage from the LCAO basis against plane waves, at one geometry.

The open dataset relaxes with plane waves and labels with GPAW's LCAO dzp basis
(``prescreen.physics.dft.label_structure``). The spillage formula itself does not depend
on the basis: ``soc_eigenstates`` writes the states with spin-orbit coupling in the
basis of the Kohn-Sham states without it, and the spillage sums the squares of those
coefficients over the occupied ones. So the same labeller runs in plane-wave mode
(``LabelSettings(mode="pw")``): plane waves at the cutoff of the relaxation, twice as
many bands as occupied ones (all but the top four converged), everything else as in the
default :class:`~prescreen.physics.dft.LabelSettings` (PBE, k density 5 per inverse
Angstrom, Fermi-Dirac 0.01 eV, non-self-consistent SOC).

For each given structure (its newest plane-wave relaxation in the build's checkpoint
``relax.jsonl``) it prints the spillage, the gap with SOC and the wall time of both, and
the difference of the spillages. A difference that moves a structure across 0.5 would
make the basis, not the relaxation, the larger error of the labels.

Run: ``python benchmarks/label_basis.py ID [ID ...]`` (minutes per structure on one
core; the plane-wave label costs several times the LCAO one).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from dataclasses import replace
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import plane_wave_relaxations  # noqa: E402


def main() -> int:
    import prescreen.physics.dft as dft
    from prescreen import SPILLAGE_THRESHOLD
    from prescreen.prototypes import structure_from_row

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("ids", nargs="+")
    p.add_argument("--work", type=Path, default=ROOT / "data_work" / "open_dataset")
    args = p.parse_args()
    newest = plane_wave_relaxations(args.work, args.ids, "label_basis")
    if newest is None:
        return 2
    settings = dft.LabelSettings()
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs; "
          f"label settings {settings.as_dict()}", flush=True)
    print(f"{'id':20s} {'formula':8s} {'ecut':>5s} {'spillage LCAO':>13s} {'PW':>7s} "
          f"{'diff':>7s} {'gap SOC LCAO':>12s} {'PW':>7s} {'wall LCAO':>9s} {'PW':>7s}",
          flush=True)
    pairs = []
    for ident in args.ids:
        rec = newest[ident]
        structure = structure_from_row(rec)
        out = {}
        for name, level in (("lcao", settings),
                            ("pw", replace(settings, mode="pw",
                                           ecut_eV=float(rec["ecut_eV"])))):
            t0 = time.perf_counter()
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    out[name] = (dft.label_structure(structure, level, id=ident),
                                 time.perf_counter() - t0)
            except Exception as exc:  # a benchmark reports and goes on
                print(f"{ident:20s} {name} failed: {exc}", flush=True)
        if len(out) < 2:
            continue
        (lc, lt), (pw, pt) = out["lcao"], out["pw"]
        pairs.append((lc.spillage, pw.spillage))
        print(f"{ident:20s} {lc.formula:8s} {rec['ecut_eV']:5.0f} {lc.spillage:13.3f} "
              f"{pw.spillage:7.3f} {pw.spillage - lc.spillage:+7.3f} {lc.gap_soc_eV:12.3f} "
              f"{pw.gap_soc_eV:7.3f} {lt:9.1f} {pt:7.1f}", flush=True)
    if pairs:
        crossed = sum((a >= SPILLAGE_THRESHOLD) != (b >= SPILLAGE_THRESHOLD)
                      for a, b in pairs)
        print(f"{len(pairs)} structures: largest |PW - LCAO| spillage "
              f"{max(abs(b - a) for a, b in pairs):.3f}; on different sides of "
              f"{SPILLAGE_THRESHOLD}: {crossed}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
