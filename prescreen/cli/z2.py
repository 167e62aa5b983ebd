"""Compute the Z2 invariant of centrosymmetric candidates from DFT parities (GPAW)."""

from __future__ import annotations

import argparse
from pathlib import Path

__all__ = ["add_arguments", "run"]

#: Columns of the results file, in order.
COLUMNS = ("id", "formula", "z2", "delta", "direct_gap_soc_eV", "kmesh", "parity_error",
           "wall_s", "status", "reason")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("ids", nargs="+", help="candidate IDs (centrosymmetric, non-magnetic)")
    parser.add_argument("--out", type=Path, default=None,
                        help="CSV to update (default <campaign>/z2.csv; rows of other IDs "
                        "are kept)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    import pandas as pd
    from tqdm.auto import tqdm

    from prescreen.campaign import Campaign
    from prescreen.errors import InputError, LabellingError
    from prescreen.physics.parity import z2_from_parities
    from prescreen.report.build import INVARIANTS_FILE

    rows = []
    with Campaign.open(args.campaign) as campaign:
        out = args.out or campaign.path / INVARIANTS_FILE
        known = set(campaign.candidate_ids())
        for cid in args.ids:
            if cid not in known:
                raise InputError("unknown candidate ID", path=campaign.path, value=cid,
                                 expected=f"an ID of campaign {campaign.name!r}")
        structures = {cid: campaign.structure(cid) for cid in args.ids}
    for cid in tqdm(args.ids, desc="parities", unit="structure", disable=args.no_progress):
        row = dict.fromkeys(COLUMNS, None) | {"id": cid}
        structure = structures[cid]
        if structure is None:
            rows.append(row | {"status": "refused", "reason": "no structure (formula only)"})
            continue
        try:
            r = z2_from_parities(structure, id=cid)
        except (InputError, LabellingError) as exc:
            rows.append(row | {"formula": structure.composition.reduced_formula,
                               "status": "refused", "reason": str(exc)})
            continue
        rows.append(row | {"formula": r.formula, "z2": r.z2,
                           "delta": " ".join(f"{d:+d}" for d in r.delta),
                           "direct_gap_soc_eV": round(r.direct_gap_soc_eV, 4),
                           "kmesh": "x".join(map(str, r.kmesh)),
                           "parity_error": r.parity_error, "wall_s": round(r.wall_s, 1),
                           "status": "ok", "reason": ""})
    table = pd.DataFrame(rows, columns=list(COLUMNS))
    table["z2"] = table["z2"].astype("Int64")  # 0 or 1, empty where refused
    if out.is_file():  # keep what earlier runs found for other candidates
        earlier = pd.read_csv(out, dtype=str, keep_default_na=False)
        fresh = table.astype(object).where(table.notna(), "").astype(str)
        table = pd.concat([earlier[~earlier["id"].isin(table["id"])], fresh])
    out.parent.mkdir(parents=True, exist_ok=True)
    table.to_csv(out, index=False)
    for row in rows:
        verdict = (f"Z2 = {row['z2']} (parities {row['delta']}, direct gap "
                   f"{row['direct_gap_soc_eV']} eV)" if row["status"] == "ok"
                   else f"no invariant: {row['reason']}")
        print(f"  {row['id']}: {verdict}")
    print(f"written to {out}")
    print("note: Z2 = 1 at this level of theory (PBE, LCAO, SOC added non-self-consistently) "
          "is strong evidence, not proof; check the gap and the functional.")
    return 0
