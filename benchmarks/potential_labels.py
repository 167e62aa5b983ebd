"""Benchmark: how far do labels of a universal potential's geometry fall from labels of
the plane-wave geometry?

The open dataset labels each monolayer at a geometry relaxed with plane waves and the
stress tensor (generation 4), which costs minutes per structure; the label itself costs
a fraction of that. The issue also allows a documented universal interatomic potential
for the geometry. This script measures what that would do to the labels: for every
monolayer in ``data_open/labelled.parquet`` whose geometry is of generation 4, it
relaxes the *pool* geometry with CHGNet within its space group under the build's rules
(``_potential_relaxation`` of the build script: a relaxation that falls apart, does not
converge or strains an in-plane length by more than 15 % is refused), labels that geometry with the labeller's default
settings, and compares the spillage with the shipped label.

Prints one line per structure (written also to ``--out`` as JSON lines, so a run
resumes and can be split over processes with ``--part i/n``), then: how many the
potential refused, the median and 90th percentile of |delta spillage|, the 2x2 table at
0.5 (common practice), the in-plane lattice against the plane-wave one, and the cost of
both routes.

Needs the ``uip`` extra (CHGNet). Run:
``python benchmarks/potential_labels.py [--data data_open] [--out FILE] [--part 1/2]``
(about 0.9 core-hours for 87 structures; ``--summary`` only reads ``--out``).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import ROOT, build_module  # noqa: E402

THRESHOLD = 0.5  # spillage at which a label counts as positive (common practice)
GENERATION = 4  # the build's RELAX_GENERATION


def _rows(data: Path) -> list[dict]:
    import pandas as pd

    labelled = pd.read_parquet(data / "labelled.parquet")
    relax = pd.read_parquet(data / "relaxation.parquet")[["id", "generation", "wall_s"]]
    relax = relax.rename(columns={"wall_s": "dft_relax_s"})
    pool = pd.read_parquet(data / "pool.parquet").set_index("id")
    rows = labelled.merge(relax, on="id")
    rows = rows[rows.generation == GENERATION].sort_values("id")
    out = []
    for r in rows.itertuples():
        start = pool.loc[r.id]
        out.append({"id": r.id, "formula": r.reduced_formula, "prototype": r.prototype,
                    "n_atoms": int(r.n_atoms), "spillage_dft": float(r.spillage),
                    "a_dft": float(r.a_A), "b_dft": float(r.b_A),
                    "label_s_dft": float(r.wall_s), "relax_s_dft": float(r.dft_relax_s),
                    "pool": {"lattice": list(start["lattice"]),
                             "species": list(start["species"]),
                             "frac_coords": list(start["frac_coords"])}})
    return out


def _measure(row: dict) -> dict:
    from prescreen.physics.dft import LabelSettings, label_structure

    build = build_module()
    res = {k: v for k, v in row.items() if k != "pool"}
    rec, structure = build._potential_relaxation(row["id"], row["pool"])  # the build's rule
    res["potential_s"] = rec["wall_s"]
    res["start"] = rec["reason"] or f"{rec['potential']} ({rec['potential_steps']} steps)"
    if rec["status"] != "ok":
        res["status"] = "refused"
        return res
    res["a_pot"], res["b_pot"] = (round(float(x), 4) for x in structure.lattice.abc[:2])
    t1 = time.perf_counter()
    try:
        label = label_structure(structure, LabelSettings(), id=row["id"])
        res.update(status="ok", spillage_pot=float(label.spillage))
    except Exception as exc:  # reported in the output, the run goes on
        res.update(status="failed", reason=f"{type(exc).__name__}: {exc}")
    res["label_s_pot"] = round(time.perf_counter() - t1, 2)
    return res


def _summary(results: list[dict]) -> None:
    import numpy as np

    ok = [r for r in results if r["status"] == "ok"]
    refused = [r for r in results if r["status"] == "refused"]
    failed = [r for r in results if r["status"] == "failed"]
    print(f"\n{len(results)} structures: {len(ok)} labelled at the potential's geometry, "
          f"{len(refused)} refused by the potential's rules, {len(failed)} failed")
    if not ok:
        return
    d = np.array([r["spillage_pot"] - r["spillage_dft"] for r in ok])
    print(f"|delta spillage|: median {np.median(np.abs(d)):.3f}, 90th percentile "
          f"{np.percentile(np.abs(d), 90):.3f}, max {np.abs(d).max():.3f}; "
          f"mean delta {d.mean():+.3f}")
    dft = np.array([r["spillage_dft"] >= THRESHOLD for r in ok])
    pot = np.array([r["spillage_pot"] >= THRESHOLD for r in ok])
    print(f"at {THRESHOLD}: both positive {int((dft & pot).sum())}, both negative "
          f"{int((~dft & ~pot).sum())}, positive only at the DFT geometry "
          f"{int((dft & ~pot).sum())}, positive only at the potential's "
          f"{int((~dft & pot).sum())}; agreement {100 * (dft == pot).mean():.0f} %")
    lat = np.array([max(r["a_pot"] / r["a_dft"] - 1, r["b_pot"] / r["b_dft"] - 1, key=abs)
                    for r in ok])
    print(f"in-plane lattice, potential over plane waves: median |diff| "
          f"{100 * np.median(np.abs(lat)):.2f} %, 90th percentile "
          f"{100 * np.percentile(np.abs(lat), 90):.2f} %")
    for lo, hi in ((0, 0.01), (0.01, 0.02), (0.02, 0.05), (0.05, 1)):
        sel = (np.abs(lat) >= lo) & (np.abs(lat) < hi)
        if sel.any():
            print(f"  lattice off {100 * lo:.0f}-{100 * hi:.0f} %: n {int(sel.sum())}, "
                  f"median |delta spillage| {np.median(np.abs(d[sel])):.3f}, "
                  f"crossed {int((dft[sel] != pot[sel]).sum())}")
    pot_s = sum(r["potential_s"] + r["label_s_pot"] for r in ok)
    dft_s = sum(r["relax_s_dft"] + r["label_s_dft"] for r in ok)
    print(f"cost of these {len(ok)}: potential + label {pot_s / 3600:.2f} core-h, "
          f"plane-wave relaxation + label {dft_s / 3600:.2f} core-h "
          f"({dft_s / max(pot_s, 1e-9):.1f} times as much)")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", type=Path, default=ROOT / "data_open")
    p.add_argument("--out", type=Path, default=Path("potential_labels.jsonl"))
    p.add_argument("--part", default="1/1", help="i/n: every n-th structure from the i-th")
    p.add_argument("--summary", action="store_true", help="only summarise --out")
    args = p.parse_args()
    done = {}
    for path in sorted(args.out.parent.glob(args.out.name + "*")):
        for line in path.read_text(encoding="utf-8").splitlines():
            if line.strip():
                rec = json.loads(line)
                done[rec["id"]] = rec
    if not args.summary:
        try:
            from prescreen.physics import prerelax
            prerelax.potential_name()
        except ImportError as exc:
            print(f"potential_labels: {exc}")
            return 2
        i, n = (int(x) for x in args.part.split("/"))
        rows = _rows(args.data)[i - 1::n]
        print(f"{len(rows)} generation-{GENERATION} labels from {args.data} (part {args.part}); "
              f"{sum(r['id'] in done for r in rows)} done before")
        out = args.out if n == 1 else args.out.with_name(f"{args.out.name}.{i}")
        for row in rows:
            if row["id"] in done:
                continue
            res = _measure(row)
            done[row["id"]] = res
            with out.open("a", encoding="utf-8") as fh:
                fh.write(json.dumps(res) + "\n")
            s = (f"{res['spillage_dft']:.3f} -> {res['spillage_pot']:.3f}"
                 if res["status"] == "ok" else res["status"])
            print(f"{res['id']:22s} {res['formula']:10s} {res['n_atoms']} {s}", flush=True)
    _summary(list(done.values()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
