"""Cost of scoring a file with a fitted model, against a bare scan of the columns it reads.

Data: the file of bench_design.py (10^7 rows of fleet telemetry with zone, pod and host_id;
written there if missing, string-dictionary host_id, or --key-type int). Models are fitted first:
numeric (the six telemetry features), categorical (+ zone and pod: 56 indicator columns), absorbed
(host_id's 10^5 levels as fixed effects). Then, in each of --repeats rounds, one after the other
(warm page cache), each prediction streamed to a Parquet file in a temporary directory:

* bare scan: pyarrow iter_batches of the columns scoring reads into float64 buffers (label columns:
  their dictionary indices), pre-buffering off;
* predict with each model; the numeric model again with intervals.

Printed: median seconds, the median over rounds of each time ÷ that round's scan, CPU seconds.
No target is set by an issue; the ratios show what each kind of term costs to score.

    PYTHONPATH=src:. python bench/bench_predict.py --rows 10000000
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
from pathlib import Path

from _measure import BASE_FEATURES, OUT, TARGET, alternating_rounds
from bench_design import scan_columns as scan


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--hosts", type=int, default=100_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--key-type", choices=["dict", "int"], default="dict")
    args = ap.parse_args()
    import tallfit
    from bench_design import write_data

    path = OUT / f"design-{args.rows}-{args.hosts}-{args.key_type}.parquet"
    if not path.exists():
        OUT.mkdir(parents=True, exist_ok=True)
        write_data(path, args.rows, args.hosts, args.key_type)
    data = str(path)
    feats = list(BASE_FEATURES)
    models = {
        "numeric": tallfit.fit(data, TARGET, feats),
        "categorical": tallfit.fit(data, TARGET, feats, categorical=["zone", "pod"]),
        "absorbed": tallfit.fit(data, TARGET, feats, absorb="host_id"),
    }
    with tempfile.TemporaryDirectory() as tmp:
        out = str(Path(tmp) / "scored.parquet")
        cases = {
            "bare scan (numeric columns)": lambda: scan(data, feats, []),
            "predict, numeric model": lambda: tallfit.predict(models["numeric"], data, out=out),
            "  with intervals": lambda: tallfit.predict(models["numeric"], data, out=out, intervals=True),
            "bare scan (+ zone, pod)": lambda: scan(data, feats, ["zone", "pod"]),
            "predict, categorical model": lambda: tallfit.predict(models["categorical"], data, out=out),
            "bare scan (+ host_id)": lambda: scan(data, feats, ["host_id"]),
            "predict, absorbed model": lambda: tallfit.predict(models["absorbed"], data, out=out),
        }
        for name, run in cases.items():
            if name.startswith("predict") or name.startswith("  "):
                run()  # compile or load the cached kernels
        seconds, cpu = alternating_rounds(cases, args.repeats)
    print(f"{args.rows:,} rows, host_id {args.hosts:,} levels ({args.key_type}), median of {args.repeats} rounds")
    print(f"{'run':32} {'seconds':>8} {'× its scan':>11} {'CPU s':>7}")
    floor = None
    for name, ts in seconds.items():
        if name.startswith("bare scan"):
            floor = ts
        ratio = statistics.median(t / s for t, s in zip(ts, floor))
        print(f"{name:32} {statistics.median(ts):8.2f} {ratio:11.2f} {statistics.median(cpu[name]):7.2f}")


if __name__ == "__main__":
    main()
