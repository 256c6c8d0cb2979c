"""tallfit's fit of a file: one pass, the default stable method unless --method says otherwise.

    python bench/bench_fit.py FILE P [--method qr|gram|auto] [--workers N] [--coef OUT.npy]

Prints one JSON line: seconds (the whole tallfit.fit call, after the imports and after one fit of
the first 1,000 rows, which pays the once-per-process costs: lazy imports inside the fit, numba's
cache loads, thread start-up; startup_s and warmup_s are theirs), rows, rows_per_s, peak_rss_mb,
solver.
"""

from __future__ import annotations

import argparse

import numpy as np

from _measure import TARGET, features_for, report, timed


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("path", nargs="+")
    ap.add_argument("p", type=int)
    ap.add_argument("--method", default="qr")
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--coef", default=None, help="save the coefficients here (.npy)")
    args = ap.parse_args()
    startup, _ = timed(lambda: __import__("tallfit.api"))  # imports are paid once per process, not per row
    import tallfit

    data = args.path if len(args.path) > 1 else args.path[0]
    warmup, _ = timed(lambda: tallfit.fit(_head(args.path[0], features_for(args.p) + [TARGET]), TARGET,
                                          features_for(args.p), method=args.method, workers=args.workers))
    seconds, r = timed(lambda: tallfit.fit(data, TARGET, features_for(args.p), method=args.method,
                                           workers=args.workers))
    if args.coef:
        np.save(args.coef, r.inference.estimate)
    rows = r.accumulator.n_read
    report({"seconds": seconds, "rows": rows, "rows_per_s": rows / seconds, "solver": r.solver,
            "trusted_digits": round(r.trusted_digits, 1), "startup_s": startup, "warmup_s": warmup})


def _head(path: str, columns: list[str], rows: int = 1000):
    """The first rows of a file as an in-memory table (for the warm-up fit)."""
    from tallfit.inputs import as_source
    import pyarrow as pa

    for chunk in as_source(path).batches(columns, rows):
        return pa.Table.from_batches([chunk.batch])
    raise SystemExit(f"{path} has no rows")


if __name__ == "__main__":
    main()
