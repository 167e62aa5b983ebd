"""Print the Kane–Mele (lambda_v, lambda_R) phase diagram from spillage and from Z2.

Usage::

    python benchmarks/phase_diagram.py out/phase_diagram.png [--mesh 12] [--lambda-so 0.06]

For each point of a grid in lambda_v / lambda_SO and lambda_R / lambda_SO the script
computes the maximum spin-orbit spillage on a Gamma-centred mesh containing K (reference:
the same model with every spin-orbit term off) and the Z2 invariant from Wilson loops,
prints both as a table, counts where the spillage classification (>= 0.5, common
practice) agrees with Z2, and saves a figure. Points whose half-filled bands overlap
(indirect gap <= 0 on a dense mesh: a semimetal) have no Z2 and are marked ``m``.
The same is done for the s-p square-lattice model along lambda_SO / lambda_c.
Published reference: Kane and Mele, PRL 95, 226801 and 146802 (2005) (QSH for
|lambda_v| < 3 sqrt(3) lambda_SO at lambda_R = 0; up to lambda_R = 2 sqrt(3) lambda_SO
at lambda_v = 0 — the latter recalled from memory).
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

__all__ = ["main"]

DENSE_MESH = 60  # divisions for the band-overlap check (multiple of 3: contains K)


def _classify(model, mesh: np.ndarray, dense: np.ndarray, n_occ: int):
    """Return (spillage max, z2 or None if the bands overlap)."""
    from prescreen.physics.tightbinding import soc_spillage
    from prescreen.physics.z2 import z2_invariant

    e = np.linalg.eigvalsh(model.hamiltonian(dense))
    spill = soc_spillage(model, mesh).max
    if e[:, n_occ].min() - e[:, n_occ - 1].max() <= 0.0:
        return spill, None
    return spill, z2_invariant(model.hamiltonian, n_occ).z2


def main(argv: list[str] | None = None) -> int:
    """Print the Kane–Mele and s-p phase diagrams from spillage and Z2; save a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from tqdm import tqdm

    from prescreen import SPILLAGE_THRESHOLD
    from prescreen.physics.tightbinding import KANE_MELE_BOUNDARY, KaneMele, SPSquare, kmesh

    parser = argparse.ArgumentParser(description=main.__doc__)
    parser.add_argument("png", type=Path, help="where to save the figure")
    parser.add_argument("--mesh", type=int, default=12, help="k mesh (multiple of 3)")
    parser.add_argument("--lambda-so", type=float, default=0.06, help="lambda_SO in t")
    args = parser.parse_args(argv)
    if args.mesh % 3:
        parser.error(f"--mesh must be a multiple of 3 so that K is on it (got {args.mesh})")

    lso = args.lambda_so
    v_ratios = np.arange(0.25, 7.01, 0.25)
    r_ratios = np.arange(0.0, 4.01, 0.25)
    mesh, dense = kmesh(args.mesh), kmesh(DENSE_MESH)
    spill = np.zeros((r_ratios.size, v_ratios.size))
    z2 = np.full(spill.shape, -1)
    start = time.perf_counter()
    with tqdm(total=spill.size, desc="Kane-Mele grid") as bar:
        for i, rr in enumerate(r_ratios):
            for j, vr in enumerate(v_ratios):
                model = KaneMele(lambda_so=lso, lambda_r=rr * lso, lambda_v=vr * lso)
                spill[i, j], z = _classify(model, mesh, dense, 2)
                z2[i, j] = -1 if z is None else z
                bar.update()
    elapsed = time.perf_counter() - start

    print(f"Kane-Mele, lambda_SO = {lso} t, mesh {args.mesh}x{args.mesh}; cell = Z2 "
          "(T/t = 1/0, m = semimetal) and max spillage")
    print("lR/lSO \\ lv/lSO " + " ".join(f"{v:5.2f}" for v in v_ratios))
    for i, rr in enumerate(r_ratios):
        cells = [("m" if z == -1 else "Tt"[1 - z]) + f"{s:4.2f}" for z, s in zip(z2[i], spill[i])]
        print(f"{rr:15.2f}  " + " ".join(c[:5] for c in cells))
    gapped = z2 >= 0
    agree = (spill >= SPILLAGE_THRESHOLD) == (z2 == 1)
    print(f"gapped points: {gapped.sum()} of {z2.size}; spillage >= {SPILLAGE_THRESHOLD} "
          f"agrees with Z2 at {np.sum(agree & gapped)} of {gapped.sum()}")
    row0 = z2[0]
    last_top = v_ratios[row0 == 1].max() if np.any(row0 == 1) else float("nan")
    print(f"lambda_R = 0: last topological lambda_v/lambda_SO on the grid {last_top:.2f}; "
          f"published boundary 3*sqrt(3) = {KANE_MELE_BOUNDARY:.3f}")
    print(f"Kane-Mele grid wall time: {elapsed:.1f} s ({1000 * elapsed / z2.size:.1f} ms per point)")

    base = SPSquare()
    ratios = np.arange(0.1, 3.01, 0.1)
    sp_spill, sp_z2 = [], []
    for ratio in ratios:
        model = SPSquare(lambda_so=ratio * base.critical_lambda)
        s, z = _classify(model, kmesh(8), kmesh(40), 4)
        sp_spill.append(s)
        sp_z2.append(-1 if z is None else z)
    print("s-p square lattice: lambda_SO/lambda_c, Z2 (m = gapless), max spillage")
    for ratio, z, s in zip(ratios, sp_z2, sp_spill):
        print(f"  {ratio:4.1f}  {'m' if z < 0 else z:>2}  {s:6.3f}")
    sp_agree = sum((s >= SPILLAGE_THRESHOLD) == (z == 1) for s, z in zip(sp_spill, sp_z2) if z >= 0)
    print(f"s-p agreement: {sp_agree} of {sum(z >= 0 for z in sp_z2)} gapped points")

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.2))
    im = ax1.pcolormesh(v_ratios, r_ratios, spill, shading="nearest", cmap="viridis",
                        vmin=0, vmax=1)
    ax1.contour(v_ratios, r_ratios, (z2 == 1).astype(float), levels=[0.5], colors="w")
    ii, jj = np.nonzero(~gapped)
    ax1.scatter(v_ratios[jj], r_ratios[ii], marker="x", color="r", s=12, label="semimetal")
    ax1.axvline(KANE_MELE_BOUNDARY, color="k", ls="--", lw=0.8, label="3√3 (λR = 0)")
    ax1.set_xlabel("λv / λSO")
    ax1.set_ylabel("λR / λSO")
    ax1.set_title("Kane–Mele: max spillage; white line: Z2 boundary")
    ax1.legend(loc="upper right", fontsize=7)
    fig.colorbar(im, ax=ax1)
    ax2.plot(ratios, sp_spill, "o-", label="max spillage")
    ax2.step(ratios, np.maximum(sp_z2, 0), where="mid", label="Z2")
    ax2.axhline(SPILLAGE_THRESHOLD, color="k", ls=":", lw=0.8)
    ax2.set_xlabel("λSO / λc")
    ax2.set_title("s, p_x, p_y square lattice")
    ax2.legend()
    fig.tight_layout()
    args.png.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(args.png, dpi=120)
    print(f"figure saved to {args.png}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
