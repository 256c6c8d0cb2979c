"""Cost of one iterative pass against a bare scan of the same file (Parquet and CSV), and with the cache.

Generates fleet telemetry with synthetic_gen (6 telemetry features + 14 extra = 20 features) as
zstd Parquet and as CSV in a temporary directory, fits it exactly once (the factor every iterative
run starts from), then times, median of --repeats runs each:

  scan      the bare scan of bench_scan.py: the 21 model columns into float64 buffers (the floor)
  design    the same pass through design_blocks with no solver work (what every pass pays)
  sgd       one SGD epoch (standardised rows, window shuffle, averaging), the solver's own code
  gd/lbfgs  one pass of loss and gradient (Problem.products at a point)
  cg        one CG pass (gradient and one Gram-vector product)
  cached    the same passes replayed from the memory-mapped design cache

and prints each as a ratio to the bare scan of the same file (targets: ≤ 1.2 streamed; ≤ 0.5 of
the bare Parquet scan with the cache).

    PYTHONPATH=src:. python bench/bench_iterative.py --rows 1000000
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from _measure import median_seconds
import synthetic_gen
import tallfit
from tallfit.engine.cache import DesignPasses
from tallfit.inputs import as_source
from tallfit.solve.iterative import sgd
from tallfit.solve.iterative.driver import prepare
from tallfit.solve.iterative.stopping import History

EXTRA = 14


def bare_scan(path: Path, columns: list[str]) -> None:
    """The floor of bench_scan.py: the file into reused float64 column-major buffers, no model."""
    from bench_scan import scan_csv, scan_parquet

    (scan_csv if path.suffix == ".csv" else scan_parquet)(str(path), columns)


def pass_kinds(problem, monitor, passes: DesignPasses) -> dict:
    p = problem.p
    x = np.full(p, 0.1)
    V = np.ones((p, 1))

    def sgd_epoch():
        history = History(monitor, time.perf_counter())
        sgd.run(problem, passes.blocks, history, epochs=1)

    def design_only():
        for _ in passes.blocks():
            pass

    return {
        "design only": design_only,
        "sgd epoch": sgd_epoch,
        "gd/lbfgs pass": lambda: problem.products(passes.blocks(), x),
        "cg pass": lambda: problem.products(passes.blocks(), x, V),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--batch-rows", type=int, default=65_536)
    ap.add_argument("--formats", default="parquet,csv")
    args = ap.parse_args()
    features = list(synthetic_gen.FEATURES) + [f"x{i:02d}" for i in range(1, EXTRA + 1)]
    columns = features + [synthetic_gen.TARGET]
    with tempfile.TemporaryDirectory() as tmp:
        print(f"{args.rows:,} rows × {len(features)} features, batch_rows={args.batch_rows:,}, "
              f"median of {args.repeats}", flush=True)
        scans = {}
        for fmt in args.formats.split(","):
            (Path(tmp) / fmt).mkdir()
            path = Path(tmp) / fmt / f"fleet.{fmt}"
            synthetic_gen.generate(path, args.rows, fmt=fmt, extra_features=EXTRA)
            exact = tallfit.fit(path, synthetic_gen.TARGET, features, batch_rows=args.batch_rows)
            problem, monitor, _ = prepare(exact.accumulator, exact.spec, standardize=True)
            src = as_source(path)
            scans[fmt] = median_seconds(lambda: bare_scan(path, columns), args.repeats)
            print(f"\n{fmt}: {path.stat().st_size / 1e6:,.0f} MB, bare scan {scans[fmt]:.2f} s "
                  f"({args.rows / scans[fmt] / 1e6:.2f} M rows/s)")
            with DesignPasses(src, exact.spec, args.batch_rows, coding=exact.coding) as passes:
                for name, fn in pass_kinds(problem, monitor, passes).items():
                    fn()  # warm (numba compile from its cache)
                    t = median_seconds(fn, args.repeats)
                    print(f"  {name:14} {t:6.2f} s   {t / scans[fmt]:5.2f} × bare {fmt} scan (target ≤ 1.2)", flush=True)
            with DesignPasses(src, exact.spec, args.batch_rows, coding=exact.coding, cache=True) as passes:
                t0 = time.perf_counter()
                for _ in passes.blocks():
                    pass
                fill = time.perf_counter() - t0
                info = passes.cache_info
                print(f"  cache fill     {fill:6.2f} s   {fill / scans[fmt]:5.2f} × bare {fmt} scan "
                      f"({info['bytes'] / 1e6:,.0f} MB, float64)")
                for name, fn in pass_kinds(problem, monitor, passes).items():
                    fn()
                    t = median_seconds(fn, args.repeats)
                    floor = scans.get("parquet", scans[fmt])
                    print(f"  cached {name:7} {t:6.2f} s   {t / floor:5.2f} × bare Parquet scan (target ≤ 0.5)",
                          flush=True)
            path.unlink()


if __name__ == "__main__":
    main()
