"""Benchmark of the high-spillage classifier: grouped-CV metrics, training and scoring cost.

Run ``python benchmarks/model.py`` (all parts) or ``--part train|score|cv``. It prints:

1. grouped 5-fold cross-validation metrics (folds by chemical system, see
   :mod:`prescreen.validation`) of :class:`prescreen.model.SpillageClassifier` and every
   baseline on the labelled table in ``data_open/`` — or says that it is missing;
2. the wall time to fit a 5-model ensemble (with its cross-validated calibration) on
   10,000 rows with the full feature count on 2 threads (goal <= 15 s);
3. the wall time and peak resident memory of scoring 10^6 rows whose features are
   cached on disk as a float32 ``.npy`` (goal <= 60 s and <= 4 GiB), measured in a fresh
   subprocess so that nothing else counts towards its peak.

Timing data come from scikit-learn's ``make_classification`` (the cost of boosting and
scoring does not depend on what the numbers mean); only part 1 uses real labels.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

#: Goals from the issue (wall seconds, GiB).
TRAIN_GOAL_S = 15.0
SCORE_GOAL_S = 60.0
SCORE_GOAL_GIB = 4.0
#: Feature count assumed when prescreen.featurise cannot be imported (the issue's "~200").
FALLBACK_N_FEATURES = 200
TRAIN_ROWS = 10_000
SCORE_ROWS = 1_000_000
THREADS = 2
CV_METRICS = ("roc_auc", "pr_auc", "brier", "log_loss", "ece", "ef@10", "ef@50", "ef@100")
FOLD_METRICS = CV_METRICS[:5]


def feature_count() -> tuple[int, str]:
    """Columns the featurisers produce, or the fallback with the reason."""
    try:
        from prescreen.featurise import default_featurisers

        n = sum(len(f.feature_names()) for f in default_featurisers())
        return n, "prescreen.featurise.default_featurisers()"
    except Exception as exc:  # featurisers still being written
        return FALLBACK_N_FEATURES, f"fallback ({type(exc).__name__}: {exc})"


def timing_data(n_rows: int, n_features: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    from sklearn.datasets import make_classification

    X, y = make_classification(
        n_samples=n_rows,
        n_features=n_features,
        n_informative=min(40, n_features // 2),
        weights=[0.85, 0.15],
        flip_y=0.02,
        random_state=seed,
    )
    return X.astype(np.float32), y


def part_train(seed: int, model_dir: Path | None = None) -> None:
    from prescreen.model import SpillageClassifier

    n_features, source = feature_count()
    X, y = timing_data(TRAIN_ROWS, n_features, seed)
    model = SpillageClassifier(n_models=5, random_state=seed, n_jobs=THREADS)
    load = os.getloadavg()[0]
    start, cpu = time.perf_counter(), time.process_time()
    model.fit(X, y)
    elapsed, cpu = time.perf_counter() - start, time.process_time() - cpu
    boosters = len(model.members_) + model.calibration_cv
    print(f"\n== training: {TRAIN_ROWS} rows x {n_features} features ({source})")
    print(f"   5-model ensemble + {model.calibration_cv}-fold calibration = {boosters} boosters, "
          f"{model.n_estimators} rounds, {THREADS} threads, calibration chosen: {model.calibration_method_}")
    print(f"   machine load average before the fit: {load:.1f} on {os.cpu_count()} CPUs (other jobs share them)")
    print(f"   fit time {elapsed:.2f} s wall, {cpu:.2f} s CPU   (goal <= {TRAIN_GOAL_S:.0f} s: {'met' if elapsed <= TRAIN_GOAL_S else 'NOT met'})")
    if model_dir is not None:
        model.save(model_dir, feature_schema=f"benchmark-{n_features}", threshold=0.5)


def part_score(seed: int) -> None:
    n_features, source = feature_count()
    with tempfile.TemporaryDirectory(prefix="prescreen-bench-") as tmp:
        tmp = Path(tmp)
        part_train(seed, model_dir=tmp / "model")
        # the feature cache: 10^6 rows near the training distribution, float32 on disk
        X, _ = timing_data(20_000, n_features, seed + 1)
        rng = np.random.default_rng(seed)
        cache = np.lib.format.open_memmap(tmp / "features.npy", mode="w+", dtype=np.float32,
                                          shape=(SCORE_ROWS, n_features))
        block = 100_000
        for start in range(0, SCORE_ROWS, block):
            rows = rng.integers(0, len(X), size=block)
            cache[start:start + block] = X[rows] + rng.normal(0, 0.1, size=(block, n_features)).astype(np.float32)
        cache.flush()
        del cache
        size_gib = (tmp / "features.npy").stat().st_size / 2**30
        out = subprocess.run(
            [sys.executable, __file__, "--score-child", str(tmp / "model"), str(tmp / "features.npy")],
            check=True, capture_output=True, text=True,
        )
        result = json.loads(out.stdout.strip().splitlines()[-1])
    print(f"\n== scoring: {SCORE_ROWS:,} rows x {n_features} features, cached as float32 .npy ({size_gib:.2f} GiB on disk)")
    print(f"   load model {result['load_s']:.2f} s, mean+std of 5 calibrated members {result['score_s']:.2f} s, "
          f"{THREADS} threads")
    print(f"   CPU time {result['cpu_s']:.2f} s; load average before scoring {result['loadavg']:.1f}")
    print(f"   peak RSS of the scoring process {result['peak_gib']:.2f} GiB")
    ok_t = result["score_s"] + result["load_s"] <= SCORE_GOAL_S
    ok_m = result["peak_gib"] <= SCORE_GOAL_GIB
    print(f"   goal <= {SCORE_GOAL_S:.0f} s: {'met' if ok_t else 'NOT met'};  goal <= {SCORE_GOAL_GIB:.0f} GiB: {'met' if ok_m else 'NOT met'}")


def score_child(model_dir: str, cache: str) -> None:
    from prescreen.model import SpillageClassifier

    load = os.getloadavg()[0]
    start, cpu = time.perf_counter(), time.process_time()
    model = SpillageClassifier.load(model_dir)
    model.set_params(n_jobs=THREADS)
    X = np.load(cache, mmap_mode="r")
    loaded = time.perf_counter()
    mean, std = model.predict_uncertainty(X)
    done = time.perf_counter()
    assert mean.shape == (X.shape[0],) and np.all(np.isfinite(mean)) and np.all(std >= 0)
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    print(json.dumps({"load_s": loaded - start, "score_s": done - loaded, "peak_gib": peak_kib / 2**20,
                      "cpu_s": time.process_time() - cpu, "loadavg": load}))


def find_labelled_table(root: Path) -> Path | None:
    """The first Parquet/CSV under ``root`` with a ``spillage`` column and ``formula`` or ``id``."""
    import pandas as pd

    if not root.is_dir():
        return None
    for path in sorted(root.rglob("*")):
        if path.suffix not in (".parquet", ".csv"):
            continue
        try:
            cols = pd.read_parquet(path).columns if path.suffix == ".parquet" else pd.read_csv(path, nrows=0).columns
        except Exception:  # not a table we can read; keep looking
            continue
        if "spillage" in cols and ("formula" in cols or "id" in cols):
            return path
    return None


def _structure(lattice, species, frac_coords):
    from pymatgen.core import Lattice, Structure

    return Structure(Lattice(np.reshape(np.asarray(lattice, float), (3, 3))), list(species),
                     np.reshape(np.asarray(frac_coords, float), (-1, 3)))


def table_structures(table, root: Path) -> tuple[list | None, str]:
    """pymatgen Structures of the labelled rows, from their own columns or the pool's."""
    import pandas as pd

    cols = ("lattice", "species", "frac_coords")
    source = table
    if not set(cols) <= set(table.columns):
        pool = root / "pool.parquet"
        if "id" not in table.columns or not pool.is_file():
            return None, "formula only: no structure columns"
        pool_table = pd.read_parquet(pool, columns=["id", *cols]).set_index("id")
        known = table["id"].isin(pool_table.index)
        if not known.all():
            return None, f"formula only: {int((~known).sum())} labelled ids not in {pool.name}"
        source = pool_table.loc[table["id"]].reset_index()
    structures = [_structure(*row) for row in source[list(cols)].itertuples(index=False)]
    return structures, "formula and structure"


def load_labelled(data: Path) -> tuple[Path, list[str], np.ndarray, Any, str] | None:
    """The labelled table under ``data`` (or the file ``data``): its path, formulas, 0/1
    labels at the spillage threshold, features and a note on them; None if there is none."""
    import pandas as pd

    from prescreen import SPILLAGE_THRESHOLD

    table_path = data if data.is_file() else find_labelled_table(data)
    if table_path is None:
        return None
    table = pd.read_parquet(table_path) if table_path.suffix == ".parquet" else pd.read_csv(table_path)
    table = table.dropna(subset=["spillage"]).reset_index(drop=True)
    if "formula" not in table.columns:  # labels keyed by id: formulas from the pool
        pool = pd.read_parquet(table_path.parent / "pool.parquet", columns=["id", "formula"]).set_index("id")
        table["formula"] = pool.loc[table["id"], "formula"].to_numpy()
    formulas = table["formula"].astype(str).tolist()
    y = (table["spillage"].to_numpy(dtype=float) >= SPILLAGE_THRESHOLD).astype(int)
    structures, structure_note = table_structures(table, table_path.parent)
    try:
        from prescreen.featurise import featurise, schema_version

        features = featurise(formulas, structures, progress=False)
        n_failed = int(features["error"].notna().sum()) if "error" in features.columns else 0
        features = features.drop(columns=[c for c in ("error",) if c in features.columns])
        feature_note = (f"{features.shape[1]} features from prescreen.featurise ({structure_note}; "
                        f"{n_failed} rows with a featurisation error, kept with NaN), schema {schema_version()[:12]}")
    except Exception as exc:
        from prescreen.baselines import magpie_features

        features = magpie_features(formulas)
        feature_note = f"matminer magpie features only ({type(exc).__name__}: {exc})"
    return table_path, formulas, y, features, feature_note


def describe_data(table_path: Path, y: np.ndarray, feature_note: str) -> None:
    """Print which labelled table was read and what the model reads."""
    from prescreen import SPILLAGE_THRESHOLD

    print(f"   data: {table_path.relative_to(REPO) if table_path.is_relative_to(REPO) else table_path}: "
          f"{len(y)} labelled rows, {y.sum()} positives (spillage >= {SPILLAGE_THRESHOLD}), "
          f"base rate {y.mean():.3f}")
    print(f"   our model reads {feature_note}")


def part_cv(seed: int, data: Path) -> None:
    from prescreen.errors import InputError
    from prescreen.baselines import BaseRateBaseline, ElementLinearBaseline, MagpieForestBaseline, RandomBaseline
    from prescreen.model import SpillageClassifier
    from prescreen.validation import cross_validate

    print(f"\n== grouped 5-fold cross-validation (folds by chemical system and reduced formula), seed {seed}")
    loaded = load_labelled(data)
    if loaded is None:
        print(f"   NOT RUN: no labelled table (a 'spillage' column with 'formula' or 'id') under {data}/ yet")
        return
    table_path, formulas, y, features, feature_note = loaded
    describe_data(table_path, y, feature_note)
    models = {
        "SpillageClassifier": (lambda: SpillageClassifier(random_state=seed, n_jobs=THREADS), features),
        "random": (lambda: RandomBaseline(random_state=seed), formulas),
        "base rate": (BaseRateBaseline, formulas),
        "per-element logistic": (ElementLinearBaseline, formulas),
        "magpie random forest": (lambda: MagpieForestBaseline(random_state=seed, n_jobs=THREADS), formulas),
    }
    rows = []
    try:
        for name, (factory, X) in models.items():
            res = cross_validate(factory, X, y, formulas, n_splits=5, random_state=seed, label=name,
                                 progress=sys.stderr.isatty())
            rows.append((name, res))
    except InputError as exc:  # too few rows, groups or positives for 5 grouped folds yet
        print(f"   NOT RUN: {exc}")
        return
    print("   per fold, mean ± sample std over 5 folds:")
    print(f"   {'model':<22}" + "".join(f"{m:>16}" for m in FOLD_METRICS))
    for name, res in rows:
        cells = "".join(f"{res.loc['mean', m]:>9.3f}±{res.loc['std', m]:<6.3f}" for m in FOLD_METRICS)
        print(f"   {name:<22}{cells}")
    print("   pooled out-of-fold predictions (every row scored by the fold model that never saw its group):")
    print(f"   {'model':<22}" + "".join(f"{m:>10}" for m in CV_METRICS))
    for name, res in rows:
        print(f"   {name:<22}" + "".join(f"{res.loc['pooled', m]:>10.3f}" for m in CV_METRICS))
    print("   ece: 10 equal-width bins; ef@k: hit rate of the top k over the base rate (nan when k > rows);")
    print("   pooling ranks scores of 5 different fold models together (the base rate is a different")
    print("   constant per fold, so its pooled roc_auc is not exactly 0.5)")


def main(argv: list[str] | None = None) -> int:
    """Print the model benchmark."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--part", choices=("all", "cv", "train", "score"), default="all")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--data", type=Path, default=REPO / "data_open")
    parser.add_argument("--score-child", nargs=2, metavar=("MODEL", "CACHE"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.score_child:
        score_child(*args.score_child)
        return 0
    print(f"prescreen model benchmark: {os.cpu_count()} CPUs visible, {THREADS} threads used, seed {args.seed}")
    if args.part in ("all", "cv"):
        part_cv(args.seed, args.data)
    if args.part == "train":
        part_train(args.seed)
    if args.part in ("all", "score"):
        part_score(args.seed)  # includes the training measurement
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
