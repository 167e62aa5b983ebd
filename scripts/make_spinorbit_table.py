"""Regenerate ``prescreen/data/spin_orbit_splittings.csv`` with Quantum ESPRESSO ``ld1.x``.

For every element from H (Z = 1) to Pu (Z = 94) this runs one fully relativistic
(``rel=2``, Dirac equation) all-electron calculation of the neutral free atom in its
ground-state configuration and records the j = l - 1/2 and j = l + 1/2 eigenvalues of

* the valence p shell: ``n p`` with n the period of the element (added with zero
  occupation when empty, e.g. W 6p0, Zn 4p0); and
* the valence d shell: ``(n-1) d`` for elements of groups 1-12 and the f block from
  period 4 on (added with zero occupation when empty, e.g. Ca 3d0, Ce 5d1 kept as is).
  For groups 13-18 the ``(n-1) d10`` shell is a filled semicore shell, not valence, and
  is not recorded.

An empty shell whose computed levels are unbound (e >= 0) or lie below the occupied
``n s`` level (a spurious solution, seen for H 2p0) is recorded as missing with a note.

Usage::

    apt-get install -y quantum-espresso   # Debian package, provides ld1.x
    python scripts/make_spinorbit_table.py [--ld1 ld1.x] [--zmax 94]

Nothing at run time of prescreen needs ``ld1.x``; only this script does.
"""

from __future__ import annotations

import argparse
import csv
import json
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from pymatgen.core import Element
from tqdm import tqdm

__all__ = ["main", "run_element", "SPLIT_LEVEL_RE"]

#: Energies are read from the e(eV) column ld1.x prints (it converts with 1 Ry =
#: 13.60569312 eV).

#: Exchange-correlation functional used in the atomic runs (Perdew-Burke-Ernzerhof GGA).
DFT = "PBE"
#: Seconds allowed for one ld1.x run before the element is recorded as failed.
TIMEOUT_S = 120.0

OUT_CSV = Path(__file__).resolve().parents[1] / "prescreen" / "data" / "spin_orbit_splittings.csv"
OUT_JSON = OUT_CSV.with_suffix(".json")

#: One line of the "Spin orbit split results" block: n l j label occ e(Ry) e(Ha) e(eV).
SPLIT_LEVEL_RE = re.compile(
    r"^\s*(\d+)\s+(\d)\s+(\d\.\d)\s+(\d[SPDF])\s+\d+\(\s*([\d.]+)\)\s+(-?[\d.]+)\s+(-?[\d.]+)\s+(-?[\d.]+)\s*$"
)
L_LETTER = {"s": 0, "p": 1, "d": 2, "f": 3}


def _config(element: Element) -> tuple[str, dict[str, float]]:
    """Ground-state configuration string for ld1.x and the orbital occupations it lists."""
    parts = element.electronic_structure.split(".")
    core = parts[0] if parts[0].startswith("[") else ""
    orbitals = parts[1:] if core else parts
    occ: dict[str, float] = {}
    for orb in orbitals:
        occ[orb[:2]] = float(orb[2:])
    return core, occ


def _valence_shells(element: Element) -> tuple[str | None, str | None]:
    period = element.row
    p_shell = f"{period}p" if period >= 2 else "2p"
    d_valence = period >= 4 and (element.group <= 12 or element.block == "f")
    d_shell = f"{period - 1}d" if d_valence else None
    return p_shell, d_shell


def run_element(z: int, ld1: str = "ld1.x") -> dict[str, object]:
    """Run ld1.x for element ``z`` and return one CSV row (energies in eV)."""
    element = Element.from_Z(z)
    core, occ = _config(element)
    p_shell, d_shell = _valence_shells(element)
    s_shell = f"{element.row}s"
    added = dict(occ)
    for shell in (s_shell, p_shell, d_shell):
        if shell is not None and shell not in added:
            added[shell] = 0.0
    config = " ".join([core] + [f"{k}{v:g}" for k, v in added.items()]).strip()
    text = (
        "&input\n"
        f"  title='{element.symbol}', zed={z}.0, rel=2, iswitch=1, dft='{DFT}',\n"
        f"  config='{config}'\n/\n"
    )
    row: dict[str, object] = {
        "Z": z,
        "symbol": element.symbol,
        "configuration": element.electronic_structure.replace(".", " "),
        "ld1_config": config,
        "p_shell": p_shell,
        "p_occupation": added.get(p_shell, 0.0),
        "p12_eV": "",
        "p32_eV": "",
        "p_splitting_eV": "",
        "d_shell": d_shell or "",
        "d_occupation": "" if d_shell is None else added.get(d_shell, 0.0),
        "d32_eV": "",
        "d52_eV": "",
        "d_splitting_eV": "",
        "note": "",
    }
    with tempfile.TemporaryDirectory() as tmp:
        try:
            proc = subprocess.run(
                [ld1], input=text, capture_output=True, text=True, cwd=tmp, timeout=TIMEOUT_S
            )
        except subprocess.TimeoutExpired:
            row["note"] = "ld1.x timed out"
            return row
    out = proc.stdout
    if "Spin orbit split results" not in out or "final scf error" not in out:
        row["note"] = "ld1.x did not converge"
        return row
    block = out.split("Spin orbit split results", 1)[1].split("Averaged results", 1)[0]
    levels: dict[tuple[str, float], tuple[float, float]] = {}
    for line in block.splitlines():
        m = SPLIT_LEVEL_RE.match(line)
        if m:
            label = m.group(4).lower()
            levels[(label, float(m.group(3)))] = (float(m.group(5)), float(m.group(8)))
    s_energy = levels.get((s_shell, 0.5), (0.0, float("nan")))[1]
    notes = []
    for shell, prefix, (jl, jh) in ((p_shell, "p", (0.5, 1.5)), (d_shell, "d", (1.5, 2.5))):
        if shell is None:
            continue
        if (shell, jl) not in levels or (shell, jh) not in levels:
            notes.append(f"{shell} levels missing from ld1.x output")
            continue
        e_low, e_high = levels[(shell, jl)][1], levels[(shell, jh)][1]
        empty = added[shell] == 0.0
        if empty and (e_low >= 0 or e_high >= 0 or e_low < s_energy):
            notes.append(f"empty {shell} level unbound or below {s_shell} (spurious); not used")
            continue
        lo_key, hi_key = ("p12_eV", "p32_eV") if prefix == "p" else ("d32_eV", "d52_eV")
        row[lo_key] = f"{e_low:.5f}"
        row[hi_key] = f"{e_high:.5f}"
        row[f"{prefix}_splitting_eV"] = f"{e_high - e_low:.5f}"
        if empty:
            notes.append(f"{shell} empty in the ground state (levels of the unoccupied shell)")
    row["note"] = "; ".join(notes)
    return row


def _version(ld1: str) -> str:
    proc = subprocess.run([ld1], input="&input\n/\n", capture_output=True, text=True, timeout=30)
    m = re.search(r"Program LD1 (v\.\S+)", proc.stdout)
    deb = subprocess.run(
        ["dpkg-query", "-W", "-f=${Version}", "quantum-espresso"], capture_output=True, text=True
    ).stdout.strip()
    return f"ld1.x {m.group(1) if m else 'unknown'} (Debian quantum-espresso {deb or 'unknown'})"


def _pymatgen_version() -> str:
    from importlib.metadata import version

    return version("pymatgen")


def main(argv: list[str] | None = None) -> int:
    """Regenerate the spin-orbit splitting table; return the process exit code."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ld1", default="ld1.x", help="path of the ld1.x executable")
    parser.add_argument("--zmax", type=int, default=94, help="last atomic number (default 94, Pu)")
    parser.add_argument("--out", type=Path, default=OUT_CSV, help="CSV file to write")
    args = parser.parse_args(argv)
    if shutil.which(args.ld1) is None:
        print(f"error: {args.ld1} not found; apt-get install -y quantum-espresso", file=sys.stderr)
        return 2
    rows = [run_element(z, args.ld1) for z in tqdm(range(1, args.zmax + 1), desc="ld1.x")]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with open(args.out, "w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    meta = {
        "file": args.out.name,
        "code": _version(args.ld1),
        "method": "fully relativistic (rel=2, Dirac) all-electron Kohn-Sham calculation of the "
        "neutral free atom, spherical, non-spin-polarised",
        "functional": DFT,
        "configurations": "ground states from pymatgen Element.electronic_structure "
        "(column 'configuration'); column 'ld1_config' is what ld1.x was given, with empty "
        "valence shells added at zero occupation",
        "units": {
            "p12_eV": "eV, eigenvalue of the valence p j=1/2 level",
            "p32_eV": "eV, eigenvalue of the valence p j=3/2 level",
            "p_splitting_eV": "eV, e(p3/2) - e(p1/2)",
            "d32_eV": "eV, eigenvalue of the valence d j=3/2 level",
            "d52_eV": "eV, eigenvalue of the valence d j=5/2 level",
            "d_splitting_eV": "eV, e(d5/2) - e(d3/2)",
            "occupations": "electrons in the shell in the ground-state configuration",
        },
        "shells": "p: n p with n the period; d: (n-1) d for groups 1-12 and the f block from "
        "period 4 (filled semicore d of groups 13-18 not recorded)",
        "resolution_eV": "1e-4 (ld1.x prints eigenvalues in eV with four decimals)",
        "pymatgen_version": _pymatgen_version(),
        "script": "scripts/make_spinorbit_table.py",
    }
    if args.out == OUT_CSV:
        OUT_JSON.write_text(json.dumps(meta, indent=2) + "\n")
    failed = [r["symbol"] for r in rows if "did not converge" in str(r["note"]) or "timed" in str(r["note"])]
    print(f"wrote {args.out} ({len(rows)} elements; failed: {failed or 'none'})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
