"""10-fold cross-validation plus a 50-penalty ridge path against the plain fit, in one run.

Writes synthetic fleet telemetry with 20 features (the 6 demo features and 14 extra ones) as
Parquet in a temporary directory, then times, median of --repeats runs each: a bare scan of the
model columns (the floor), the plain fit (one pass), and ``validate`` with 10 folds and a
50-penalty ridge path chosen by CV (one pass, everything else from the factors). Target: the
validation run at most 1.3× the plain fit.

    PYTHONPATH=src:. python bench/bench_validation.py --rows 1000000
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import synthetic_gen
from synthetic_gen.scenario import extra_feature_names
from tallfit.api import fit, validate
from tallfit.sources import open_source

EXTRA = 14


def timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--folds", type=int, default=10)
    ap.add_argument("--penalties", type=int, default=50)
    ap.add_argument("--fold-key", default=None, help="e.g. host_id for grouped folds")
    args = ap.parse_args()
    feats = list(synthetic_gen.FEATURES) + list(extra_feature_names(EXTRA))
    with tempfile.TemporaryDirectory() as tmp:
        data = Path(tmp) / "fleet"
        t_gen = timed(lambda: synthetic_gen.generate(data, args.rows, seed=5, files=4, extra_features=EXTRA))
        columns = feats + [synthetic_gen.TARGET] + ([args.fold_key] if args.fold_key else [])

        def scan():
            for _ in open_source(data).batches(columns, 65_536):
                pass

        def plain():
            fit(data, synthetic_gen.TARGET, feats)

        def validated():
            validate(data, synthetic_gen.TARGET, feats, folds=args.folds, fold_key=args.fold_key, ridge="auto",
                     ridge_count=args.penalties)

        print(f"{args.rows:,} rows × {len(feats)} features, {args.folds} folds"
              f"{' by ' + args.fold_key if args.fold_key else ''}, {args.penalties} penalties; "
              f"median of {args.repeats} (data written in {t_gen:.1f} s)")
        validated()  # warm-up: imports, page cache
        times = {name: [] for name in ("scan", "plain fit", "validate")}
        for _ in range(args.repeats):  # interleaved, so drift hits all three alike
            times["scan"].append(timed(scan))
            times["plain fit"].append(timed(plain))
            times["validate"].append(timed(validated))
        med = {k: statistics.median(v) for k, v in times.items()}
        for name, secs in med.items():
            print(f"  {name:10} {secs:7.2f} s   {args.rows / secs / 1e6:6.2f} M rows/s   "
                  f"{secs / med['scan']:5.2f}× scan")
        ratio = med["validate"] / med["plain fit"]
        print(f"validate / plain fit = {ratio:.2f} (target ≤ 1.30: {'met' if ratio <= 1.3 else 'NOT met'})")


if __name__ == "__main__":
    main()
