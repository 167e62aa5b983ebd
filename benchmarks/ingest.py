"""Benchmark: ingest generated monolayer files and a large formula CSV.

Writes ``--structures`` generated monolayers (MX2 in 2H/1T phases and honeycomb AB
layers, bond lengths 0.95-1.08 x the summed covalent radii, supercells and small rattles; one third each as
POSCAR, extended XYZ and CIF) and a ``--formulas``-row formula CSV into a temporary
folder, then streams both through :func:`prescreen.io.structures.iter_candidates`,
runs :func:`prescreen.monolayer.check_monolayer` on every structure and prints
throughput and peak memory (``resource.getrusage`` max RSS; with ``--tracemalloc``
also the peak of Python allocations, which slows the run).

Usage::

    python benchmarks/ingest.py [--structures 10000] [--formulas 1000000] [--seed 0]
"""

from __future__ import annotations

import argparse
import collections
import resource
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
from ase.data import atomic_numbers, covalent_radii
from tqdm import tqdm

from prescreen.candidate import Candidate
from prescreen.io.structures import iter_candidates
from prescreen.monolayer import check_monolayer

METALS = ["Mo", "W", "Cr", "Ti", "Zr", "Hf", "Nb", "Ta", "V", "Pt", "Pd", "Sn"]
CHALCOGENS = ["S", "Se", "Te"]
HONEYCOMB = [("B", "N"), ("Al", "N"), ("Ga", "N"), ("Si", "C"), ("C", "C"), ("Zn", "O"), ("Ga", "As")]
FORMULA_ELEMENTS = ["Mo", "W", "Bi", "Sb", "Sn", "Pb", "Ti", "Zr", "Hf", "Cr", "Fe", "Co", "Ni", "Pt",
                    "S", "Se", "Te", "I", "Br", "Cl", "O", "N", "As", "P"]


def _max_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux reports KiB


def _layer(rng: np.random.Generator) -> tuple[np.ndarray, list[str], np.ndarray]:
    """One generated monolayer: lattice (3, 3) A, symbols, Cartesian positions (n, 3) A."""
    vacuum = rng.uniform(15.0, 20.0)
    if rng.random() < 0.7:
        metal, chalcogen = str(rng.choice(METALS)), str(rng.choice(CHALCOGENS))
        # bond length 0.95-1.08 x the summed covalent radii (Cordero 2008, via ase.data)
        bond = (covalent_radii[atomic_numbers[metal]] + covalent_radii[atomic_numbers[chalcogen]]) * rng.uniform(0.95, 1.08)
        half = bond * rng.uniform(0.55, 0.65)  # chalcogen height above the metal plane
        a = np.sqrt(3.0 * (bond**2 - half**2))
        lower = (1 / 3, 2 / 3) if rng.random() < 0.5 else (2 / 3, 1 / 3)  # 2H (prismatic) or 1T (octahedral)
        frac = [(0, 0, 0), (1 / 3, 2 / 3, half), (*lower, -half)]
        symbols = [metal, chalcogen, chalcogen]
    else:
        first, second = HONEYCOMB[rng.integers(len(HONEYCOMB))]
        bond = (covalent_radii[atomic_numbers[first]] + covalent_radii[atomic_numbers[second]]) * rng.uniform(0.95, 1.08)
        buckle = bond * rng.uniform(0.0, 0.3)
        a = np.sqrt(3.0 * (bond**2 - buckle**2))
        frac = [(0, 0, 0), (1 / 3, 2 / 3, buckle)]
        symbols = [first, second]
    thickness = max(z for *_, z in frac) - min(z for *_, z in frac)
    c = thickness + vacuum
    lattice = np.array([[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]])
    inplane = np.array([[x, y, 0.0] for x, y, _ in frac]) @ lattice
    positions = inplane + np.array([[0, 0, z + c / 2] for *_, z in frac])
    n = int(rng.choice([1, 2, 3]))
    if n > 1:  # n x n supercell
        shifts = np.array([i * lattice[0] + j * lattice[1] for i in range(n) for j in range(n)])
        positions = (positions[None, :, :] + shifts[:, None, :]).reshape(-1, 3)
        symbols = symbols * (n * n)
        lattice = lattice * np.array([[n], [n], [1]])
    positions = positions + rng.normal(scale=0.02, size=positions.shape)
    return lattice, symbols, positions


def _poscar(lattice, symbols, positions) -> str:
    order = sorted(range(len(symbols)), key=lambda k: symbols[k])
    species = list(dict.fromkeys(symbols[k] for k in order))
    counts = [sum(1 for s in symbols if s == sp) for sp in species]
    lines = ["generated monolayer", "1.0"]
    lines += ["  ".join(f"{x:.8f}" for x in row) for row in lattice]
    lines += [" ".join(species), " ".join(map(str, counts)), "Cartesian"]
    lines += ["  ".join(f"{x:.8f}" for x in positions[k]) for k in order]
    return "\n".join(lines) + "\n"


def _extxyz(lattice, symbols, positions) -> str:
    cell = " ".join(f"{x:.8f}" for x in lattice.ravel())
    lines = [str(len(symbols)), f'Lattice="{cell}" Properties=species:S:1:pos:R:3 pbc="T T T"']
    lines += [f"{s} " + " ".join(f"{x:.8f}" for x in p) for s, p in zip(symbols, positions)]
    return "\n".join(lines) + "\n"


def _cif(lattice, symbols, positions, name: str) -> str:
    lengths = np.linalg.norm(lattice, axis=1)
    cosines = [lattice[1] @ lattice[2] / lengths[1] / lengths[2], lattice[0] @ lattice[2] / lengths[0] / lengths[2],
               lattice[0] @ lattice[1] / lengths[0] / lengths[1]]
    angles = np.degrees(np.arccos(cosines))
    # fractional coordinates in the CIF's standard orientation are those of the lattice
    frac = positions @ np.linalg.inv(lattice)
    lines = [f"data_{name}", "_symmetry_space_group_name_H-M 'P 1'"]
    lines += [f"_cell_length_{k} {v:.8f}" for k, v in zip("abc", lengths)]
    lines += [f"_cell_angle_{k} {v:.8f}" for k, v in zip(("alpha", "beta", "gamma"), angles)]
    lines += ["loop_", "_symmetry_equiv_pos_as_xyz", "'x, y, z'", "loop_", "_atom_site_type_symbol",
              "_atom_site_label", "_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z",
              "_atom_site_occupancy"]
    lines += [f"{s} {s}{k} {f[0]:.8f} {f[1]:.8f} {f[2]:.8f} 1" for k, (s, f) in enumerate(zip(symbols, frac))]
    return "\n".join(lines) + "\n"


def write_structures(folder: Path, n: int, rng: np.random.Generator) -> None:
    for k in tqdm(range(n), desc="writing structures", file=sys.stderr):
        lattice, symbols, positions = _layer(rng)
        kind = k % 3
        if kind == 0:
            (folder / f"m{k:06d}.vasp").write_text(_poscar(lattice, symbols, positions))
        elif kind == 1:
            (folder / f"m{k:06d}.extxyz").write_text(_extxyz(lattice, symbols, positions))
        else:
            (folder / f"m{k:06d}.cif").write_text(_cif(lattice, symbols, positions, f"m{k:06d}"))


def write_formulas(path: Path, n: int, rng: np.random.Generator) -> None:
    elements = np.array(FORMULA_ELEMENTS)
    with path.open("w") as handle:
        handle.write("id,formula\n")
        for start in tqdm(range(0, n, 100_000), desc="writing formulas", file=sys.stderr):
            size = min(100_000, n - start)
            first = rng.integers(0, 14, size)
            second = rng.integers(14, len(elements), size)
            a = rng.integers(1, 4, size)
            b = rng.integers(1, 6, size)
            handle.writelines(f"f{start + k:07d},{elements[first[k]]}{a[k]}{elements[second[k]]}{b[k]}\n"
                              for k in range(size))


def ingest_structures(folder: Path, n: int) -> dict[str, object]:
    statuses: collections.Counter[str] = collections.Counter()
    by_format: dict[str, list[float]] = collections.defaultdict(lambda: [0, 0.0])
    rejected = 0
    check_time = check_cpu = 0.0
    cpu = time.process_time()
    start = time.perf_counter()
    last = start
    for item in tqdm(iter_candidates(folder), total=n, desc="ingesting structures", file=sys.stderr):
        read_done = time.perf_counter()
        if not isinstance(item, Candidate):
            rejected += 1
            print(f"  rejected: {item}", file=sys.stderr)
            last = time.perf_counter()
            continue
        suffix = Path(item.source.split(":")[0]).suffix
        by_format[suffix][0] += 1
        by_format[suffix][1] += read_done - last
        t0, c0 = time.perf_counter(), time.process_time()
        statuses[check_monolayer(item.structure).status] += 1
        check_time += time.perf_counter() - t0
        check_cpu += time.process_time() - c0
        last = time.perf_counter()
    total = time.perf_counter() - start
    return {"total": total, "cpu": time.process_time() - cpu, "check": check_time, "check_cpu": check_cpu,
            "statuses": dict(statuses), "rejected": rejected,
            "by_format": {k: (int(v[0]), v[1]) for k, v in by_format.items()}}


def ingest_formulas(path: Path) -> dict[str, object]:
    count = rejected = 0
    cpu = time.process_time()
    start = time.perf_counter()
    for item in iter_candidates(path):
        if isinstance(item, Candidate):
            count += 1
        else:
            rejected += 1
    return {"total": time.perf_counter() - start, "cpu": time.process_time() - cpu, "count": count,
            "rejected": rejected}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--structures", type=int, default=10_000)
    parser.add_argument("--formulas", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--tracemalloc", action="store_true", help="also trace Python allocations (slower)")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory(prefix="prescreen-ingest-") as tmp:
        folder = Path(tmp) / "structures"
        folder.mkdir()
        write_structures(folder, args.structures, rng)
        csv_path = Path(tmp) / "formulas.csv"
        write_formulas(csv_path, args.formulas, rng)
        rss0 = _max_rss_mib()
        print(f"python {sys.version.split()[0]}; max RSS after writing inputs: {rss0:.0f} MiB")

        if args.tracemalloc:
            tracemalloc.start()
        s = ingest_structures(folder, args.structures)
        peak_s = tracemalloc.get_traced_memory()[1] / 2**20 if args.tracemalloc else None
        rss1 = _max_rss_mib()
        n_ok = sum(s["statuses"].values())
        print(f"\nstructures: {n_ok} read, {s['rejected']} rejected, {s['total']:.1f} s wall, {s['cpu']:.1f} s CPU "
              f"({n_ok / s['total']:.0f} structures/s end to end, wall)")
        for suffix, (count, seconds) in sorted(s["by_format"].items()):
            print(f"  reading {suffix:8s} {count:6d} files  {count / seconds:7.0f} files/s")
        print(f"  monolayer check: {s['check']:.2f} s wall ({n_ok / s['check']:.0f} structures/s, "
              f"{1e3 * s['check'] / n_ok:.2f} ms each), {s['check_cpu']:.2f} s CPU "
              f"({n_ok / s['check_cpu']:.0f} structures/s); statuses {s['statuses']}")
        print(f"  max RSS {rss1:.0f} MiB" + (f"; traced Python peak {peak_s:.1f} MiB" if peak_s is not None else ""))

        if args.tracemalloc:
            tracemalloc.reset_peak()
        f = ingest_formulas(csv_path)
        peak_f = tracemalloc.get_traced_memory()[1] / 2**20 if args.tracemalloc else None
        rss2 = _max_rss_mib()
        print(f"\nformulas: {f['count']} candidates, {f['rejected']} rejected, {f['total']:.1f} s wall, "
              f"{f['cpu']:.1f} s CPU ({f['count'] / f['total']:.0f} rows/s wall, {f['count'] / f['cpu']:.0f} rows/s CPU)")
        print(f"  max RSS {rss2:.0f} MiB" + (f"; traced Python peak {peak_f:.1f} MiB" if peak_f is not None else ""))


if __name__ == "__main__":
    main()
