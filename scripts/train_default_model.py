"""Train the shipped default model on data_open/ (fixed seed, reproducible).

Run: ``python scripts/train_default_model.py`` (writes models/default/). The model is
LightGBM text files plus metadata.json (feature schema, package versions, training-data
hash, grouped-CV metrics); no pickles. Rerunning on the same data gives the same files.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main(argv: list[str] | None = None) -> int:
    from prescreen.acquire.rounds import DEFAULT_SEED, fit_and_validate, training_table
    from prescreen.featurise import schema_version
    from prescreen.model import training_data_hash

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", type=Path, default=ROOT / "data_open")
    p.add_argument("--out", type=Path, default=ROOT / "models" / "default")
    p.add_argument("--models", type=int, default=5)
    p.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = p.parse_args(argv)
    t0 = time.perf_counter()
    table = training_table(None, data_open=args.data, progress=False)
    model, cv = fit_and_validate(table, n_models=args.models, random_state=args.seed,
                                 progress=False)
    metrics = {} if cv.empty else {k: float(v) for k, v in cv.loc["mean"].items()
                                   if v == v}
    model.save(args.out, feature_schema=schema_version(),
               training_data_hash=training_data_hash(table.X, table.y, table.weight),
               metrics=metrics, threshold=table.threshold)
    if not cv.empty:
        cv.to_csv(args.out / "grouped_cv.csv")
    print(f"trained on {len(table)} labelled monolayers ({int(table.y.sum())} with spillage "
          f">= {table.threshold:g}) in {time.perf_counter() - t0:.1f} s")
    for key in ("roc_auc", "pr_auc", "brier", "ece"):
        if key in metrics:
            print(f"  grouped CV {key}: {metrics[key]:.3f}")
    print(f"written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
