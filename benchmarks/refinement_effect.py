"""Benchmark: what the lattice refinement changed in the open dataset's checkpoints.

Reads ``data_work/open_dataset`` (the build's checkpoints): for every relaxation that was
made by the scans alone and since refined (``relax.jsonl``), the lattice change, and,
where it was labelled again, the spillage before and after (``labels/records.jsonl``).
Prints counts, the distribution of the change, and the labels that crossed the 0.5
threshold.

Run: ``python benchmarks/refinement_effect.py [--work data_work/open_dataset]`` (seconds).
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _build import checkpoint_arguments  # noqa: E402

THRESHOLD = 0.5  # spillage at which a label counts as positive (common practice)


def main() -> int:
    import numpy as np

    from prescreen.physics.labeller import record_lines

    work, relax = checkpoint_arguments(__doc__.splitlines()[0])
    refined = [r for r in relax if "scan_wall_s" in r]
    if not refined:
        print(f"no refined relaxations in {work / 'relax.jsonl'} yet")
        return 2
    failed = [r for r in refined if r.get("refine_failed")]
    done = [r for r in refined if not r.get("refine_failed")]
    strain = np.array([100 * max(abs(u) for u in r.get("lattice_strain", [0.0])) for r in done])
    moved = [r for r, s in zip(done, strain) if s > 0]
    print(f"refined: {len(done)} (failed: {len(failed)}); lattice moved: {len(moved)}; "
          f"kept within the tolerance: {len(done) - len(moved)}")
    if len(strain):
        print(f"largest strain per structure (%): median {np.median(strain):.2f}, "
              f"90th percentile {np.percentile(strain, 90):.2f}, max {strain.max():.2f}")
        print(f"refinement wall time (s): median "
              f"{np.median([r['refine_wall_s'] for r in done]):.0f}, total "
              f"{sum(r['refine_wall_s'] for r in done) / 3600:.2f} h")
    by_id: dict[str, list[dict]] = {}
    for line in record_lines(work / "labels"):
        if line.get("status") == "ok":
            by_id.setdefault(line["id"], []).append(line)
    pairs = [(r["id"], by_id[r["id"]][-2]["spillage"], by_id[r["id"]][-1]["spillage"])
             for r in moved if len(by_id.get(r["id"], [])) >= 2]
    if pairs:
        delta = np.array([new - old for _, old, new in pairs])
        flips = [(i, old, new) for i, old, new in pairs
                 if (old >= THRESHOLD) != (new >= THRESHOLD)]
        print(f"relabelled: {len(pairs)}; spillage change: median |d| {np.median(abs(delta)):.3f}, "
              f"max |d| {abs(delta).max():.3f}; crossed {THRESHOLD}: {len(flips)}")
        for ident, old, new in flips:
            print(f"  {ident}: {old:.3f} -> {new:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
