"""Benchmark: what relaxing with the stress tensor changed in the open dataset.

Reads ``data_work/open_dataset`` (the build's checkpoints). For every structure relaxed
again with the plane-wave stress tensor (generation 4, GENERATION) after a relaxation of an earlier
protocol (``relax.jsonl``): the change of status, the change of the in-plane lattice
against the earlier relaxation, and, where both geometries were labelled, the spillage
before and after (``labels/records.jsonl``). Also the cost of these relaxations:
wall time and BFGS steps. Prints counts, distributions and the labels that crossed the
0.5 threshold.

Run: ``python benchmarks/upgrade_effect.py [--work data_work/open_dataset]`` (seconds).
"""

from __future__ import annotations

import sys
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import checkpoint_arguments  # noqa: E402

THRESHOLD = 0.5  # spillage at which a label counts as positive (common practice)
GENERATION = 4  # the build's RELAX_GENERATION


def _percentiles(name: str, values: list[float], unit: str) -> str:
    import numpy as np

    v = np.asarray(values, dtype=float)
    return (f"{name} ({unit}): n {len(v)}, median {np.median(v):.2f}, 90th percentile "
            f"{np.percentile(v, 90):.2f}, max {v.max():.2f}")


def main() -> int:
    import numpy as np

    from prescreen.physics.labeller import record_lines

    work, relax = checkpoint_arguments(__doc__.splitlines()[0])
    history: dict[str, list[dict]] = {}
    for r in relax:
        history.setdefault(r["id"], []).append(r)
    current = [h[-1] for h in history.values() if h[-1].get("generation") == GENERATION]
    if not current:
        print(f"no generation-{GENERATION} relaxations in {work / 'relax.jsonl'} yet")
        return 2
    ok = [r for r in current if r["status"] == "ok"]
    print(f"generation {GENERATION}: {len(current)} relaxations "
          f"({dict(Counter(r['status'] for r in current))})")
    print(_percentiles("wall time per relaxation", [r["wall_s"] for r in current], "s"))
    if ok:
        print(_percentiles("BFGS steps of the successful ones",
                           [r.get("bfgs_steps", 0) for r in ok], "steps"))
        print(_percentiles("largest in-plane change from the pool geometry",
                           [100 * max(abs(u) for u in r.get("lattice_strain", [0.0]))
                            for r in ok], "%"))
    pairs = []  # (new, the newest record of an earlier protocol for the same id)
    for h in history.values():
        earlier = [r for r in h[:-1] if r.get("generation", 1) < GENERATION]
        if h[-1].get("generation") == GENERATION and earlier:
            pairs.append((h[-1], earlier[-1]))
    print(f"relaxed again after an earlier protocol: {len(pairs)}; status before -> after: "
          f"{dict(Counter((old['status'], new['status']) for new, old in pairs))}")
    both_ok = [(new, old) for new, old in pairs
               if new["status"] == "ok" and old["status"] == "ok"]
    if both_ok:
        change = [100 * max(abs(new["a_A"] / old["a_A"] - 1), abs(new["b_A"] / old["b_A"] - 1))
                  for new, old in both_ok]
        print(_percentiles("largest in-plane change against the earlier relaxation",
                           change, "%"))
    spill: dict[str, list[float]] = {}
    for line in record_lines(work / "labels"):
        if line.get("status") == "ok":
            spill.setdefault(line["id"], []).append(float(line["spillage"]))
    relabelled = [(new["id"], spill[new["id"]][-2], spill[new["id"]][-1])
                  for new, _ in both_ok if len(spill.get(new["id"], [])) >= 2]
    if relabelled:
        delta = np.array([b - a for _, a, b in relabelled])
        flips = [(i, a, b) for i, a, b in relabelled if (a >= THRESHOLD) != (b >= THRESHOLD)]
        print(f"labelled before and after: {len(relabelled)}; spillage change: median |d| "
              f"{np.median(abs(delta)):.3f}, 90th percentile {np.percentile(abs(delta), 90):.3f}, "
              f"max |d| {abs(delta).max():.3f}; crossed {THRESHOLD}: {len(flips)}")
        for ident, a, b in flips:
            print(f"  {ident}: {a:.3f} -> {b:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
