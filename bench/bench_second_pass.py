"""Cost of the second pass (robust sums, clusters, binned diagnostics) against a bare scan.

Generates server-fleet telemetry with synthetic_gen (6 telemetry features + 14 extra = 20
features), writes it as Parquet in a temporary directory, fits it, then times (median of
--repeats runs, warm page cache):

* bare scan: every batch of the 21 model columns decoded by the same Source, nothing else;
* fit pass: the factor accumulation (for scale);
* second pass: residuals, leverages, HC0–HC3 sums, Breusch–Pagan, binned residuals per feature
  and fitted value, the 2-D histogram, the residual sketch and the top-k rows; and the same
  with errors clustered by host_id.

Target: second pass ≤ 1.3 × bare scan.

    PYTHONPATH=src:. python bench/bench_second_pass.py --rows 1000000
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

from _measure import median_seconds
import synthetic_gen
from tallfit.engine.local import accumulate
from tallfit.engine.second_pass import second_pass
from tallfit.inputs import as_source


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--batch-rows", type=int, default=65_536)
    args = ap.parse_args()
    import tallfit

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "fleet"
        t0 = time.perf_counter()
        synthetic_gen.generate(folder, args.rows, seed=11, extra_features=14, heteroskedastic=True)
        print(f"generated {args.rows:,} rows in {time.perf_counter() - t0:.1f} s")
        features = list(synthetic_gen.FEATURES) + [f"x{j:02d}" for j in range(1, 15)]
        source = as_source(str(folder))
        model = tallfit.fit(source, target=synthetic_gen.TARGET, features=features, batch_rows=args.batch_rows)
        columns = features + [synthetic_gen.TARGET]
        second_pass(model, source, batch_rows=args.batch_rows)  # compile the kernels (cached after)

        def scan():
            for _ in source.batches(columns, args.batch_rows):
                pass

        t_scan = median_seconds(scan, args.repeats)
        t_fit = median_seconds(lambda: accumulate(source, model.spec, args.batch_rows), args.repeats)
        t_two = median_seconds(lambda: second_pass(model, source, batch_rows=args.batch_rows), args.repeats)
        t_robust = median_seconds(lambda: second_pass(model, source, diagnostics=False, batch_rows=args.batch_rows),
                         args.repeats)
        t_clu = median_seconds(lambda: second_pass(model, source, cluster=["host_id"], batch_rows=args.batch_rows),
                      args.repeats)
        print(f"{args.rows:,} rows × {len(features)} features, batch_rows={args.batch_rows:,}, "
              f"median of {args.repeats}")
        print(f"{'pass':44} {'seconds':>8} {'× bare scan':>12}")
        for name, t in [("bare scan (decode only)", t_scan), ("fit pass (factor)", t_fit),
                        ("second pass, robust sums only", t_robust),
                        ("second pass, robust + diagnostics", t_two),
                        ("second pass, + clusters by host_id", t_clu)]:
            print(f"{name:44} {t:8.2f} {t / t_scan:12.2f}")
        print(f"target: second pass ≤ 1.30 × bare scan; measured {t_two / t_scan:.2f}")
        print(f"peak resident memory of this process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
