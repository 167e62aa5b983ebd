"""Compute the Z2 invariant of centrosymmetric candidates from DFT parities (GPAW)."""

from __future__ import annotations

import argparse
from pathlib import Path

__all__ = ["add_arguments", "run"]

#: Columns of the results file, in order.
COLUMNS = ("id", "formula", "z2", "delta", "direct_gap_soc_eV", "kmesh", "inversion_centre",
           "parity_error", "wall_s", "status", "reason")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("ids", nargs="+", help="candidate IDs (centrosymmetric, non-magnetic)")
    parser.add_argument("--out", type=Path, default=None,
                        help="CSV to update (default <campaign>/z2.csv; rows of other IDs "
                        "are kept)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def _read_earlier(path: Path) -> dict[str, dict[str, str]]:
    """Rows of an earlier results file by ID (empty when there is none)."""
    import csv

    from prescreen.errors import InputError

    if not path.is_file():
        return {}
    rows: dict[str, dict[str, str]] = {}
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if reader.fieldnames is None or "id" not in reader.fieldnames:
            raise InputError("not a Z2 results file", path=path, line=1,
                             value=",".join(reader.fieldnames or []),
                             expected="the columns " + ",".join(COLUMNS))
        for row in reader:
            rows[row["id"]] = {c: row.get(c) or "" for c in COLUMNS}
    return rows


def _write(path: Path, rows: dict[str, dict[str, str]]) -> None:
    """Write all rows through a temporary file (a kill leaves the old file or the new)."""
    import csv
    import os

    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(COLUMNS), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows.values())
    os.replace(tmp, path)


def run(args: argparse.Namespace) -> int:
    import importlib.util

    from tqdm.auto import tqdm

    from prescreen.campaign import Campaign
    from prescreen.errors import InputError, LabellingError
    from prescreen.physics.parity import z2_from_parities
    from prescreen.report.build import INVARIANTS_FILE

    if importlib.util.find_spec("gpaw") is None:
        raise InputError("GPAW is not importable", value="gpaw",
                         expected="the DFT extra: `make dft-env` or "
                         "`bash scripts/install_gpaw.sh .venv`")
    ids = list(dict.fromkeys(args.ids))  # each once, in the order given
    with Campaign.open(args.campaign) as campaign:
        out = args.out or campaign.path / INVARIANTS_FILE
        known = set(campaign.candidate_ids())
        for cid in ids:
            if cid not in known:
                raise InputError("unknown candidate ID", path=campaign.path, value=cid,
                                 expected=f"an ID of campaign {campaign.name!r}")
        structures = {cid: campaign.structure(cid) for cid in ids}
    table = _read_earlier(out)
    for cid in tqdm(ids, desc="parities", unit="structure", disable=args.no_progress):
        row = dict.fromkeys(COLUMNS, "") | {"id": cid}
        structure = structures[cid]
        try:
            if structure is None:
                raise InputError("no structure (a formula-only candidate)", value=cid,
                                 expected="a candidate read from a structure file")
            r = z2_from_parities(structure, id=cid)
        except (InputError, LabellingError) as exc:
            row |= {"formula": "" if structure is None else structure.composition.reduced_formula,
                    "status": "refused", "reason": str(exc)}
            if table.get(cid, {}).get("status") == "ok":
                print(f"  {cid}: no invariant this time ({exc}); the earlier result is kept")
                continue
        else:
            row |= {"formula": r.formula, "z2": str(r.z2),
                    "delta": " ".join(f"{d:+d}" for d in r.delta),
                    "direct_gap_soc_eV": f"{r.direct_gap_soc_eV:.4f}",
                    "kmesh": "x".join(map(str, r.kmesh)),
                    "inversion_centre": " ".join(f"{v:.6f}" for v in r.inversion_centre),
                    "parity_error": f"{r.parity_error:.2e}", "wall_s": f"{r.wall_s:.1f}",
                    "status": "ok"}
        table[cid] = row
        _write(out, table)  # after every candidate: a kill loses at most the one running
        verdict = (f"Z2 = {row['z2']} (parities {row['delta']}, direct gap "
                   f"{row['direct_gap_soc_eV']} eV)" if row["status"] == "ok"
                   else f"no invariant: {row['reason']}")
        print(f"  {cid}: {verdict}")
    print(f"written to {out}")
    print("note: Z2 = 1 at this level of theory (PBE, LCAO, SOC added non-self-consistently) "
          "is strong evidence, not proof; check the gap and the functional.")
    return 0
