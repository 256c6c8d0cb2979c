"""Cost of per-group models (--by) against the plain fit of the same file.

Data: bench/out/p20_n{ROWS}_zstd.parquet (run_all.py makes it: fleet telemetry with region, 5
values, and host_id, 2,000 values). Six features. In each of --repeats rounds, one after the
other: the plain fit, a model per region, a model per host. Printed: median seconds and the
median per-round ratio to the plain fit (the models per group also pay one solve each after the
pass, ≈ 1.5 ms per group here).

    PYTHONPATH=src:. python bench/bench_groups.py --rows 10000000
"""

from __future__ import annotations

import argparse
import statistics

from _measure import TARGET, alternating_rounds, features_for, p20_file


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    import tallfit

    data, feats = str(p20_file(args.rows)), features_for(20)[:6]
    cases = {"plain fit": lambda: tallfit.fit(data, TARGET, feats),
             "by region (5 groups)": lambda: tallfit.fit(data, TARGET, feats, by="region"),
             "by host_id (2,000 groups)": lambda: tallfit.fit(data, TARGET, feats, by="host_id")}
    for run in cases.values():
        run()
    seconds, _ = alternating_rounds(cases, args.repeats)
    base = seconds["plain fit"]
    print(f"{args.rows:,} rows × 6 features, median of {args.repeats} rounds")
    for name, ts in seconds.items():
        ratio = statistics.median(t / b for t, b in zip(ts, base))
        print(f"{name:28s} {statistics.median(ts):7.2f} s   × plain {ratio:5.2f}")


if __name__ == "__main__":
    main()
