"""Write the demo's candidate files (an invented scenario) into examples/ferngrove/.

The Ferngrove Layered Matter Group (invented for the demo) screens monolayers for
quantum spin Hall candidates. Its candidate list arrives the way real ones do: a few
CIF files from one student, POSCARs from another, an extended XYZ trajectory dump, an
ASE database, and a spreadsheet of formulas nobody has built structures for yet. Some
entries are deliberately bad (a bulk crystal, a repeated structure, an unknown element)
so that the demo shows the checks at work.

Run: ``python scripts/make_demo_inputs.py`` (deterministic; rewrites the input files).

``examples/ferngrove/results.csv`` holds the group's "earlier" results. They are real
calculations, made with prescreen's own labeller at the input geometries::

    prescreen create /tmp/fg examples/ferngrove
    prescreen label /tmp/fg fg-hc-001 fg-hc-002 fg-hc-003 fg-hc-004 fg-hc-005 fg-hc-006 \
        fg-flat-001 fg-flat-002 fg-tmd-001 fg-tmd-003 fg-db-001

and copied (spillage, core-hours, band gap with SOC) from ``/tmp/fg/labels/records.jsonl``;
this script leaves that file alone. ``examples/ferngrove/z2.csv`` holds the group's Z2
checks of its gapped hits, also real, written by ``prescreen z2 /tmp/fg`` (no IDs: every
gapped hit) and ``prescreen z2 /tmp/fg fg-tmd-001`` (refused: no inversion centre).
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import numpy as np
from ase import Atoms
from ase.build import bulk, graphene, mx2
from ase.db import connect
from ase.io import write

OUT = Path(__file__).resolve().parents[1] / "examples" / "ferngrove"
VACUUM_A = 9.0  # vacuum on each side of the layer, Angstrom (common practice: >= 15 A total)


def buckled_honeycomb(symbols: str, a: float, buckle: float) -> Atoms:
    """Two-atom honeycomb with sublattices displaced by +-buckle/2 along z."""
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, 2 * VACUUM_A + buckle]]
    frac = [[1 / 3, 2 / 3, 0.5], [2 / 3, 1 / 3, 0.5]]
    atoms = Atoms(symbols, scaled_positions=frac, cell=cell, pbc=[True, True, False])
    atoms.positions[1, 2] += buckle
    atoms.center(axis=2)
    return atoms


def main() -> None:
    for sub in ("cif", "poscar"):
        if (OUT / sub).exists():
            shutil.rmtree(OUT / sub)
        (OUT / sub).mkdir(parents=True)
    # Student A: transition-metal dichalcogenides as CIF files.
    tmds = {"fg-tmd-001": ("MoS2", "2H", 3.18, 3.13), "fg-tmd-002": ("WSe2", "2H", 3.32, 3.36),
            "fg-tmd-003": ("PtSe2", "1T", 3.75, 2.53), "fg-tmd-004": ("MoTe2", "2H", 3.55, 3.60),
            "fg-tmd-005": ("ZrS2", "1T", 3.68, 2.90), "fg-tmd-006": ("WTe2", "2H", 3.55, 3.63)}
    for name, (formula, kind, a, t) in tmds.items():
        write(OUT / "cif" / f"{name}.cif", mx2(formula, kind, a=a, thickness=t, vacuum=VACUUM_A))
    # Student B: group-IV and group-V honeycombs as POSCARs.
    honey = {"fg-hc-001": ("Sn2", 4.67, 0.85), "fg-hc-002": ("Bi2", 4.34, 1.73),
             "fg-hc-003": ("Sb2", 4.12, 1.65), "fg-hc-004": ("Ge2", 4.06, 0.69),
             "fg-hc-005": ("Si2", 3.87, 0.44), "fg-hc-006": ("InSb", 4.57, 0.80)}
    for name, (sym, a, buckle) in honey.items():
        write(OUT / "poscar" / f"{name}.vasp", buckled_honeycomb(sym, a, buckle),
              format="vasp", direct=True)
    # A dump from a structure search: multi-frame extended XYZ with names in the info.
    frames = []
    for name, sym, a in [("fg-flat-001", "BN", 2.51), ("fg-flat-002", "C2", 2.46),
                         ("fg-flat-003", "AlN", 3.13)]:
        at = graphene(sym, a=a, vacuum=VACUUM_A)
        at.info["name"] = name
        frames.append(at)
    rocksalt = bulk("NaCl", "rocksalt", a=5.64)  # a bulk crystal that slipped in
    rocksalt.info["name"] = "fg-bulk-001"
    frames.append(rocksalt)
    again = mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=VACUUM_A)
    again.translate([0.4, 0.2, 0.0])  # the same MoS2 monolayer as fg-tmd-001, shifted
    again.info["name"] = "fg-tmd-001-copy"
    frames.append(again)
    write(OUT / "search_dump.extxyz", frames, format="extxyz")
    # A shared ASE database.
    db_path = OUT / "shared.db"
    with connect(db_path, append=False) as db:
        for name, formula, kind, a, t in [("fg-db-001", "HfSe2", "1T", 3.75, 3.1),
                                          ("fg-db-002", "NbSe2", "2H", 3.45, 3.4),
                                          ("fg-db-003", "TaS2", "2H", 3.31, 3.1)]:
            db.write(mx2(formula, kind, a=a, thickness=t, vacuum=VACUUM_A), name=name)
    # A spreadsheet of formulas without structures (one with a typo'd element).
    rows = [("fg-f-001", "Bi2Se3"), ("fg-f-002", "Bi2Te3"), ("fg-f-003", "Sb2Te3"),
            ("fg-f-004", "SnTe"), ("fg-f-005", "PbTe"), ("fg-f-006", "GeTe"),
            ("fg-f-007", "HgTe"), ("fg-f-008", "InSe"), ("fg-f-009", "GaSe"),
            ("fg-f-010", "TlBiSe2"), ("fg-f-011", "ZrTe5"), ("fg-f-012", "Na3Bi"),
            ("fg-f-013", "Jk2Se3"), ("fg-f-014", "Bi2Se3")]
    with open(OUT / "wishlist.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "formula"])
        w.writerows(rows)
    print(f"wrote demo inputs to {OUT}")


if __name__ == "__main__":
    main()
