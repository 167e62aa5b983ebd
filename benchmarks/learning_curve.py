"""Learning curve of the high-spillage classifier on the open labels: how much do more
labels help?

Run ``python benchmarks/learning_curve.py [--repeats 5] [--data data_open]``. For each
repeat, the labelled rows of ``data_open/`` are split into 5 grouped folds (no chemical
system straddles two folds, as in :mod:`prescreen.validation`). Within each fold, the
model is trained on a random share (25, 50, 75 and 100 %) of the training fold's
chemical systems and scores the whole test fold, so that every share is judged on the
same rows. It prints, per share, the mean training size and the pooled out-of-fold
ROC-AUC, PR-AUC and Brier score (mean ± sample std over repeats), next to the floors
(ROC-AUC 0.5; PR-AUC and Brier of the base rate).

The slope from 50 % to 100 % says whether the model is still data-limited; it does not
extrapolate to sizes not measured.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from model import THREADS, describe_data, load_labelled  # noqa: E402

SHARES = (0.25, 0.5, 0.75, 1.0)
METRICS = ("roc_auc", "pr_auc", "brier")


def share_of_groups(train: np.ndarray, groups: np.ndarray, y: np.ndarray, share: float,
                    rng: np.random.Generator) -> np.ndarray:
    """Rows of ``train`` whose chemical systems make up about ``share`` of its rows (whole
    systems, drawn at random until the share is reached); both classes kept."""
    if share >= 1.0:
        return train
    for _ in range(100):
        order = rng.permutation(np.unique(groups[train]))
        sizes = np.array([np.sum(groups[train] == g) for g in order])
        keep = order[: int(np.searchsorted(np.cumsum(sizes), share * len(train))) + 1]
        rows = train[np.isin(groups[train], keep)]
        if 0 < y[rows].sum() < len(rows):
            return rows
    raise RuntimeError(f"no draw of {share:.0%} of the training systems holds both classes")


def main(argv: list[str] | None = None) -> int:
    """Print the learning curve."""
    from prescreen.model import SpillageClassifier
    from prescreen.validation import classification_metrics, formula_groups, grouped_folds

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5, help="fold draws (default 5)")
    parser.add_argument("--data", type=Path, default=REPO / "data_open")
    args = parser.parse_args(argv)
    loaded = load_labelled(args.data)
    print("prescreen learning curve: grouped 5-fold CV, training on a share of each training fold")
    if loaded is None:
        print(f"   NOT RUN: no labelled table under {args.data}/")
        return 2
    table_path, formulas, y, features, note = loaded
    describe_data(table_path, y, note)
    groups = formula_groups(formulas)
    results: dict[float, list[dict[str, float]]] = {s: [] for s in SHARES}
    sizes: dict[float, list[int]] = {s: [] for s in SHARES}
    for repeat in range(args.repeats):
        rng = np.random.default_rng(1000 + repeat)
        oof = {s: np.full(len(y), np.nan) for s in SHARES}
        for train, test in grouped_folds(formulas, n_splits=5, y=y, random_state=repeat):
            for share in SHARES:
                rows = share_of_groups(train, groups, y, share, rng)
                sizes[share].append(len(rows))
                model = SpillageClassifier(random_state=repeat, n_jobs=THREADS)
                model.fit(features.iloc[rows], y[rows], groups=groups[rows])
                oof[share][test] = model.predict_proba(features.iloc[test])[:, 1]
        for share in SHARES:
            results[share].append(classification_metrics(y, oof[share], k_values=()))
        print(f"   repeat {repeat + 1}/{args.repeats} done", file=sys.stderr)
    base = float(y.mean())
    print(f"   {args.repeats} repeats; pooled out-of-fold metrics, mean ± sample std over repeats")
    print(f"   {'share':>6} {'train rows':>11}" + "".join(f"{m:>17}" for m in METRICS))
    for share in SHARES:
        cells = ""
        for m in METRICS:
            v = np.array([r[m] for r in results[share]])
            sd = v.std(ddof=1) if len(v) > 1 else float("nan")
            cells += f"{v.mean():>10.3f} ± {sd:<5.3f}"
        print(f"   {share:>6.0%} {np.mean(sizes[share]):>11.1f}{cells}")
    print(f"   floors: roc_auc 0.500, pr_auc {base:.3f} (base rate), brier {base * (1 - base):.3f} "
          "(the base rate for everyone)")
    gain = (np.mean([r["roc_auc"] for r in results[1.0]])
            - np.mean([r["roc_auc"] for r in results[0.5]]))
    print(f"   roc_auc gained from 50 % to 100 % of the training rows: {gain:+.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
