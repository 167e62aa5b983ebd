"""Benchmark: does a plane-wave stress relaxation end at the minimum of the energy?

``relax_monolayer_pw`` stops where the in-plane stress, with GPAW's estimate of the
Pulay stress added, vanishes. The Pulay term is an estimate from free atoms; the energy
at a fixed cutoff needs none. This script takes the newest relaxation (a plane-wave one) of
each given structure in the build's checkpoint (``relax.jsonl``), scales its in-plane
cell isotropically (positions fractional), relaxes the positions at each scale with the
same cutoff, k mesh (that of the relaxed cell, kept fixed) and smearing, and prints the
energy per scale, the in-plane virial at each point (with the Pulay term, as the
relaxation sees it), the minimum of a parabola through the three lowest energies and
its distance from the relaxed lattice. A stress relaxation that is right lands within a
fraction of a per cent of that minimum.

Run: ``python benchmarks/pw_energy_check.py ID [ID ...] [--scales 0.96 0.98 1 1.02 1.04]``
(a few minutes per structure on one core).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import build_module, plane_wave_relaxations  # noqa: E402


def main() -> int:
    from ase.optimize import BFGS
    from gpaw import GPAW, PW, FermiDirac

    from prescreen.physics.dft import (LabelSettings, _in_plane_virial, _pulay_corrected,
                                       choose_kpts, prepare_monolayer, pulay_virial_eV)
    from prescreen.prototypes import structure_from_row

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("ids", nargs="+")
    p.add_argument("--scales", nargs="*", type=float, default=[0.96, 0.98, 1.0, 1.02, 1.04])
    p.add_argument("--work", type=Path, default=ROOT / "data_work" / "open_dataset")
    p.add_argument("--fmax", type=float, default=0.02, help="eV/A for the positions")
    args = p.parse_args()
    build = build_module()
    newest = plane_wave_relaxations(args.work, args.ids, "pw_energy_check")
    if newest is None:
        return 2
    settings = LabelSettings(kpt_density=build.RELAX_KPT_DENSITY,
                             smearing_eV=build.RELAX_SMEARING_EV)
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs; positions "
          f"relaxed to {args.fmax} eV/A at each scale", flush=True)
    for ident in args.ids:
        rec = newest[ident]
        base = prepare_monolayer(structure_from_row(rec), settings.vacuum_A)
        ecut = float(rec["ecut_eV"])
        kmesh = choose_kpts(base, settings)
        pulay = pulay_virial_eV(base.get_chemical_symbols(), ecut, settings.xc)
        a0 = float(np.linalg.norm(base.cell[0]))
        print(f"\n{ident} {base.get_chemical_formula()}: generation {rec.get('generation')}, "
              f"a = {a0:.4f} A, {ecut:.0f} eV, k mesh {kmesh}, Pulay virial {pulay:.3f} eV",
              flush=True)
        print(f"{'scale':>6s} {'a (A)':>8s} {'E (eV)':>12s} {'virial xx,yy (eV)':>18s} "
              f"{'steps':>5s} {'wall s':>7s}", flush=True)
        energies = []
        for s in args.scales:
            atoms = base.copy()
            cell = atoms.cell.array.copy()
            cell[:2] *= s
            atoms.set_cell(cell, scale_atoms=True)
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                dft = GPAW(mode=PW(ecut), xc=settings.xc, kpts={"size": kmesh, "gamma": True},
                           occupations=FermiDirac(settings.smearing_eV),
                           spinpol=settings.spinpol, txt=None)
                atoms.calc = _pulay_corrected(dft, pulay)
                opt = BFGS(atoms, logfile=None)
                opt.run(fmax=args.fmax, steps=100)
                energy = float(atoms.get_potential_energy())
                virial = _in_plane_virial(atoms)
            energies.append(energy)
            print(f"{s:6.3f} {a0 * s:8.4f} {energy:12.5f} {virial[0]:8.3f},{virial[1]:8.3f} "
                  f"{opt.get_number_of_steps():5d} {time.perf_counter() - t0:7.1f}", flush=True)
        e = np.asarray(energies)
        k = int(np.argmin(e))
        if 0 < k < len(e) - 1:
            x = np.asarray(args.scales[k - 1:k + 2])
            c2, c1, _ = np.polyfit(x, e[k - 1:k + 2], 2)
            best = -c1 / (2 * c2)
            print(f"energy minimum (parabola through the three lowest): scale {best:.4f}, "
                  f"a = {a0 * best:.4f} A, {100 * (best - 1):+.2f} % from the relaxed lattice",
                  flush=True)
        else:
            print(f"energy minimum at the edge of the scan (scale {args.scales[k]}): the "
                  "relaxed lattice is not at a minimum of the energy within the scan", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
