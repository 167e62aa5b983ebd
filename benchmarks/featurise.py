"""Benchmark: prescreen featurisers against matminer's magpie preset, and structure speed.

Prints, in one run and side by side:

1. prescreen's Magpie composition features against matminer's
   ``ElementProperty.from_preset("magpie")`` on the same 10,000 varied formulas, end to end
   (formula parsing included on both sides, one process each): formulas/s, speed ratio
   and the largest absolute difference over all 132 features;
2. prescreen's monolayer structure features on 2,000 generated monolayers with at most
   6 atoms per cell: structures/s.

Usage::

    python benchmarks/featurise.py [--formulas 10000] [--structures 2000] [--seed 0]
"""

from __future__ import annotations

import argparse
import os
import platform
import time
import warnings

import numpy as np

__all__ = ["main", "make_formulas", "make_monolayers"]

#: Elements drawn for the formulas (H..Bi, the range of typical screening candidates).
FORMULA_ELEMENTS = (
    "H Li Be B C N O F Na Mg Al Si P S Cl K Ca Sc Ti V Cr Mn Fe Co Ni Cu Zn Ga Ge As Se Br "
    "Rb Sr Y Zr Nb Mo Ru Rh Pd Ag Cd In Sn Sb Te I Cs Ba La Hf Ta W Re Os Ir Pt Au Hg Tl Pb Bi"
).split()
METALS = "Ti V Cr Zr Nb Mo Hf Ta W Sn Pb Ga In Ge Pt Pd Ni Re Bi Sb".split()
ANIONS = "S Se Te O N P As F Cl Br I C Si".split()
VACUUM_A = 18.0  # angstrom, common practice for isolated layers


def make_formulas(n: int, rng: np.random.Generator) -> list[str]:
    """``n`` varied formulas: 1-5 distinct elements, integer and decimal amounts."""
    out = []
    for _ in range(n):
        k = int(rng.integers(1, 6))
        els = rng.choice(FORMULA_ELEMENTS, size=k, replace=False)
        parts = []
        for e in els:
            r = rng.random()
            amt = "" if r < 0.3 else str(int(rng.integers(2, 9))) if r < 0.8 else f"{rng.uniform(0.05, 3):.2f}"
            parts.append(f"{e}{amt}")
        out.append("".join(parts))
    return out


def make_monolayers(n: int, rng: np.random.Generator) -> list:
    """``n`` monolayers with 2-6 atoms: honeycombs, 2H/1T MX2, Janus, square nets, 2x1 cells."""
    from pymatgen.core import Lattice, Structure

    def hexcell(a: float, t: float) -> Lattice:
        c = t + VACUUM_A
        return Lattice([[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]])

    out = []
    for i in range(n):
        kind = i % 6
        a = float(rng.uniform(2.4, 4.2))
        h = float(rng.uniform(0.0, 1.8))
        m, x, y = rng.choice(METALS), rng.choice(ANIONS), rng.choice(ANIONS)
        if kind == 0:  # honeycomb, flat or buckled
            lat = hexcell(a, h)
            c = lat.c
            s = Structure(lat, [m, x], [[1 / 3, 2 / 3, 0.5 + h / 2 / c], [2 / 3, 1 / 3, 0.5 - h / 2 / c]])
        elif kind in (1, 2, 3):  # 2H, 1T, Janus MXY
            lat = hexcell(a, 2 * h + 0.5)
            c = lat.c
            top = [1 / 3, 2 / 3]
            bottom = [1 / 3, 2 / 3] if kind != 2 else [2 / 3, 1 / 3]
            s = Structure(lat, [m, x, x if kind != 3 else y],
                          [[0, 0, 0.5], [*top, 0.5 + (h + 0.25) / c], [*bottom, 0.5 - (h + 0.25) / c]])
        elif kind == 4:  # square net MX with buckling
            c = h + VACUUM_A
            s = Structure(Lattice.from_parameters(a, a, c, 90, 90, 90), [m, x],
                          [[0, 0, 0.5], [0.5, 0.5, 0.5 + h / c]])
        else:  # 2x1 cell of a 1T layer: 6 atoms
            lat = hexcell(a, 2 * h + 0.5)
            c = lat.c
            s = Structure(lat, [m, x, x], [[0, 0, 0.5], [1 / 3, 2 / 3, 0.5 + (h + 0.25) / c],
                                           [2 / 3, 1 / 3, 0.5 - (h + 0.25) / c]]) * (2, 1, 1)
        out.append(s)
    return out


def _rate(n: int, seconds: float) -> str:
    return f"{n / seconds:,.0f}/s"


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print the figures; returns 0."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--formulas", type=int, default=10_000)
    parser.add_argument("--structures", type=int, default=2_000)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(args.seed)

    from matminer.featurizers.composition import ElementProperty
    from pymatgen.core import Composition
    from tqdm.auto import tqdm

    from prescreen.featurise import (
        MagpieFeaturiser,
        MonolayerStructureFeaturiser,
        default_featurisers,
        featurise,
    )
    from prescreen.featurise.composition import magpie_table

    formulas = make_formulas(args.formulas, rng)
    structures = make_monolayers(args.structures, rng)
    n_unique = len(set(formulas))
    magpie_table()  # load the element tables once (matminer loads its own in from_preset)

    # --- composition: matminer reference, one process, parsing included -------------
    ep = ElementProperty.from_preset("magpie")
    t0 = time.perf_counter()
    ref = np.array([ep.featurize(Composition(f)) for f in tqdm(formulas, desc="matminer magpie")])
    t_mm = time.perf_counter() - t0

    # --- composition: ours, end to end through the batch runner ---------------------
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        ours = featurise(formulas, featurisers=[MagpieFeaturiser()], progress=False)
        times.append(time.perf_counter() - t0)
    t_ours = min(times)
    values = ours.drop(columns="error").to_numpy()
    max_diff = float(np.nanmax(np.abs(values - ref)))
    comp_feats = [f for f in default_featurisers() if not isinstance(f, MonolayerStructureFeaturiser)]
    t0 = time.perf_counter()
    all_comp = featurise(formulas, featurisers=comp_feats, progress=False)
    t_all = time.perf_counter() - t0

    # --- structures ---------------------------------------------------------------
    s_formulas = [s.composition.formula.replace(" ", "") for s in structures]
    n_atoms = [len(s) for s in structures]
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        sf = featurise(s_formulas, structures, featurisers=[MonolayerStructureFeaturiser()],
                       progress=False)
        times.append(time.perf_counter() - t0)
    t_struct = min(times)
    t0 = time.perf_counter()
    full = featurise(s_formulas, structures, progress=False)
    t_full = time.perf_counter() - t0

    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    print()
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} (shared machine)")
    print(f"composition: {len(formulas):,} formulas ({n_unique:,} distinct), seed {args.seed}")
    print(f"{'':34s}{'matminer magpie':>18s}{'prescreen magpie':>18s}")
    print(f"{'time (s)':34s}{t_mm:18.3f}{t_ours:18.4f}")
    print(f"{'formulas/s':34s}{_rate(len(formulas), t_mm):>18s}{_rate(len(formulas), t_ours):>18s}")
    print(f"{'speed ratio (prescreen/matminer)':34s}{'':>18s}{t_mm / t_ours:>17.0f}x")
    print(f"{'max |difference|, 132 features':34s}{'':>18s}{max_diff:>18.2e}")
    print(f"{'rows with errors':34s}{'':>18s}{int(ours['error'].notna().sum()):>18d}")
    print(f"all composition featurisers ({sum(len(f.feature_names()) for f in comp_feats)} features): "
          f"{t_all:.4f} s, {_rate(len(formulas), t_all)}, rows with errors "
          f"{int(all_comp['error'].notna().sum())}")
    print(f"structures: {len(structures):,} generated monolayers, {min(n_atoms)}-{max(n_atoms)} "
          f"atoms per cell")
    print(f"{'monolayer structure features':34s}{t_struct:10.3f} s  {_rate(len(structures), t_struct):>12s}"
          f"  errors {int(sf['error'].notna().sum())}")
    print(f"{'all featurisers (' + str(full.shape[1] - 1) + ' features)':34s}{t_full:10.3f} s  "
          f"{_rate(len(structures), t_full):>12s}  errors {int(full['error'].notna().sum())}")
    print(f"goals: >= 200x matminer and <= 1e-9 -> {t_mm / t_ours >= 200 and max_diff <= 1e-9}; "
          f">= 2,000 structures/s -> {len(structures) / t_struct >= 2000}")
    return 0


if __name__ == "__main__":
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # pymatgen's noble-gas electronegativity
        raise SystemExit(main())
