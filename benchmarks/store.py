"""Benchmark: adding candidates to a campaign store (checks, duplicates, one transaction).

Prints throughput and peak memory for a formula CSV and for a folder of generated
monolayer structures, each added with ``Campaign.add_candidates`` (formula parsing,
monolayer check, duplicate search against the store, hazard flags, SQLite insert).

Run: ``python benchmarks/store.py [--formulas 1000000] [--structures 5000]``.
"""

from __future__ import annotations

import argparse
import csv
import itertools
import os
import resource
import tempfile
import time
from pathlib import Path

METALS = ["Mo", "W", "Nb", "Ta", "Ti", "Zr", "Hf", "Sn", "Pb", "Bi", "Sb", "Ge", "Si", "Ga",
          "In", "Tl"]
ANIONS = ["S", "Se", "Te", "O", "N", "P", "As", "F", "Cl", "Br", "I"]


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def write_formulas(path: Path, n: int) -> None:
    combos = itertools.cycle(itertools.product(METALS, ANIONS, range(1, 4), range(1, 7)))
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "formula"])
        for i in range(n):
            m, x, a, b = next(combos)
            w.writerow([f"f{i}", f"{m}{a}{x}{b}"])


def write_structures(folder: Path, n: int) -> None:
    """Distinct 2H/1T MX2 monolayers (lattice constant varied so few are duplicates)."""
    from ase.build import mx2
    from ase.io import write

    folder.mkdir()
    combos = itertools.cycle(itertools.product(METALS, ANIONS[:3], ("2H", "1T")))
    frames = []
    for i in range(n):
        m, x, kind = next(combos)
        atoms = mx2(f"{m}{x}2", kind, a=3.0 + 0.001 * (i % 997), thickness=3.2, vacuum=8.0)
        atoms.info["id"] = f"s{i}"
        frames.append(atoms)
    write(folder / "layers.extxyz", frames, format="extxyz")


def run(label: str, source: Path) -> None:
    from prescreen.campaign import Campaign
    from prescreen.io.structures import iter_candidates

    with tempfile.TemporaryDirectory() as tmp:
        t0, c0 = time.perf_counter(), time.process_time()
        with Campaign.create(Path(tmp) / "c") as camp:
            rep = camp.add_candidates(iter_candidates([source]))
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    n = rep.added + rep.already_present
    print(f"{label}: {n} added in {wall:.1f} s wall, {cpu:.1f} s CPU "
          f"({n / wall:,.0f}/s wall, {n / cpu:,.0f}/s CPU); duplicates {rep.duplicates}; "
          f"rejected {len(rep.rejections)}; peak RSS so far {peak_mib():.0f} MiB")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--formulas", type=int, default=1_000_000)
    p.add_argument("--structures", type=int, default=5_000)
    args = p.parse_args()
    print(f"load average at start: {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    with tempfile.TemporaryDirectory() as tmp:
        if args.formulas:
            csv_path = Path(tmp) / "formulas.csv"
            write_formulas(csv_path, args.formulas)
            run(f"formula CSV ({args.formulas:,} rows)", csv_path)
        if args.structures:
            write_structures(Path(tmp) / "layers", args.structures)
            run(f"structures ({args.structures:,} monolayers, extxyz)", Path(tmp) / "layers")


if __name__ == "__main__":
    main()
