"""Compute spillage with the built-in DFT labeller (GPAW) and ingest it."""

from __future__ import annotations

import argparse

__all__ = ["add_arguments", "run", "BASES"]

#: Basis sets available offline: gpaw-data ships only dzp files, and GPAW reduces them
#: to single-zeta (polarised) sets on request.
BASES = ("dzp", "szp(dzp)", "sz(dzp)")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("campaign", help="campaign folder")
    parser.add_argument("ids", nargs="*", help="candidate IDs (default: all pending proposals)")
    parser.add_argument("--workers", type=int, default=1,
                        help="parallel single-core calculations (default 1)")
    parser.add_argument("--timeout", type=float, default=1800.0,
                        help="wall-time limit per structure in seconds (default 1800)")
    parser.add_argument("--retry-failed", action="store_true",
                        help="compute again the candidates whose earlier calculation failed "
                        "(e.g. a timeout: raise --timeout as well)")
    parser.add_argument("--z2", action="store_true",
                        help="then compute the Z2 invariant (parities at the TRIMs, or Wilson loops "
                        "without an inversion centre) of every "
                        "new hit whose bands with SOC are apart at every k (insulators, and "
                        "semimetals with a direct gap); results in <campaign>/z2.csv")
    theory = parser.add_argument_group(
        "level of theory", "fixed by the campaign's first `label` run (in "
        "<campaign>/labels/settings.json) and used for every later spillage and Z2 "
        "calculation of the campaign; defaults: PBE, LCAO dzp, 5 k-points per inverse "
        "Angstrom, 0.01 eV Fermi-Dirac width, 15 Angstrom vacuum, spin-paired")
    theory.add_argument("--kpt-density", type=float, metavar="PER_A",
                        help="k-points per inverse Angstrom (|b| including 2 pi) of the mesh")
    theory.add_argument("--basis", choices=BASES,
                        help="GPAW LCAO basis set: the double-zeta polarised sets gpaw-data "
                        "ships, or the smaller sets GPAW takes from them")
    theory.add_argument("--mode", choices=("lcao", "pw"),
                        help="basis of the spillage calculation: lcao (the --basis; the "
                        "default) or pw (plane waves, as the open dataset relaxes; Z2 runs "
                        "in LCAO either way)")
    theory.add_argument("--ecut", type=float, metavar="EV",
                        help="plane-wave cutoff in eV with --mode pw (default: 500 eV, "
                        "700 eV for layers with N, O or F)")
    theory.add_argument("--smearing", type=float, metavar="EV",
                        help="Fermi-Dirac width k_B T in eV")
    theory.add_argument("--vacuum", type=float, metavar="A",
                        help="vacuum between the layer and its image, in Angstrom")
    theory.add_argument("--spin-polarised", action="store_const", const=True, default=None,
                        help="collinear spin-polarised ground state from a ferromagnetic "
                        "start, for magnetic candidates (Z2 then refuses: it needs "
                        "time-reversal symmetry)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")


def run(args: argparse.Namespace) -> int:
    from prescreen.acquire.rounds import label_pending
    from prescreen.campaign import Campaign

    with Campaign.open(args.campaign) as campaign:
        settings = campaign.label_settings(
            kpt_density=args.kpt_density, basis=args.basis, smearing_eV=args.smearing,
            vacuum_A=args.vacuum, spinpol=args.spin_polarised, mode=args.mode,
            ecut_eV=args.ecut)
        wanted = args.ids or campaign.pending_ids()
        if not wanted and args.z2:
            from prescreen.errors import CampaignError

            # e.g. a run interrupted during its Z2 step: the labels are in already
            raise CampaignError("nothing to label: no pending proposals; for the invariants "
                                f"of the labelled hits run `prescreen z2 {args.campaign}`")
        out = label_pending(campaign, ids=args.ids or None, workers=args.workers,
                            timeout_s=args.timeout, progress=not args.no_progress,
                            retry_failed=args.retry_failed, settings=settings)
        print(f"labelled {out.n_ok} of {out.n_jobs} ({out.core_hours:.3f} core-hours this "
              f"run); ingested {out.n_ingested} new results")
        for cid, reason in out.failures:
            print(f"  failed: {cid}: {reason}")
        labels = campaign.labels()
        mine = labels.loc[[c for c in wanted if c in labels.index]]
        hits = mine[mine["spillage"] >= campaign.threshold]
        if len(mine):
            import pandas as pd

            from prescreen.invariants import gapped_hits
            from prescreen.physics.dft import METAL_GAP_EV

            defined = len(gapped_hits(campaign, hits.index))
            gap = pd.to_numeric(hits["gap_soc_eV"], errors="coerce")
            direct = pd.to_numeric(hits["direct_gap_soc_eV"], errors="coerce")
            gapped = int((gap >= METAL_GAP_EV).sum())
            unknown = int((gap.isna() & direct.isna()).sum())
            print(f"hits (spillage >= {campaign.threshold:g}): {len(hits)} of {len(mine)}; "
                  f"{gapped} with a band gap with SOC, {defined - gapped} semimetals with a "
                  f"direct gap at every k (Z2 defined for both), "
                  f"{len(hits) - defined - unknown} metals"
                  + (f", {unknown} with no gap recorded" if unknown else "") + " "
                  "(`prescreen train --min-gap` counts only the first as positives)")
        if out.failures and not args.retry_failed:
            print("  (failed candidates stay pending; `prescreen label "
                  f"{args.campaign} --retry-failed` computes them again)")
        print(f"raw records in {out.out_dir}")
        if args.z2:
            from prescreen.cli.z2 import print_outcomes
            from prescreen.invariants import INVARIANTS_FILE, compute_invariants, gapped_hits

            hits = gapped_hits(campaign, wanted)
            if hits:
                print(f"Z2 of {len(hits)} hit(s) whose bands with SOC are apart at every k:")
                print_outcomes(compute_invariants(campaign, hits, progress=not args.no_progress),
                               campaign.path / INVARIANTS_FILE, settings)
            else:
                print("no new hit whose bands with SOC are apart at every k: no invariant "
                      "to compute")
    return 0
