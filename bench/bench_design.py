"""Cost of categorical terms and an absorbed key, against the numeric-only fit of the same file.

Writes fleet telemetry (synthetic_gen, 100,000 hosts; host_id as string labels in a Parquet
dictionary, or with --key-type int as int32 host numbers) with two extra label columns that vary
within a host, ``zone`` (8 levels) and ``pod`` (50 levels), as one zstd Parquet file. Then,
each in its own process (so peak RSS is that run's own), median of --repeats runs:

  scan         bare pyarrow scan of the numeric model columns into float64 buffers (the floor)
  scan_labels  the same plus zone, pod and host_id as read (Arrow dictionaries: their indices to
               numpy), the floor of the "both" run, which must decode them too
  scan_labels_2  scan_labels on two threads, each reading every other row group (as the fit's
               parts use the cores): the floor of "both" on this machine's cores
  numeric      fit of power_w on the six telemetry features
  categorical  + zone and pod as indicator columns (levels found while streaming)
  absorb       numeric features, host_id (100,000 levels) absorbed as fixed effects
  both         categorical and absorbed together

and prints time ratios to the numeric fit (target: categorical + absorbed ≤ 1.5×) and peak RSS.
Each fit is timed after a fit of the file's first 200,000 rows with the same options, which pays the
once-per-process costs (as in bench_fit.py; printed as the warm-up column); each scan after one
scan of the whole file.

    PYTHONPATH=src:. python bench/bench_design.py --rows 10000000
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

from _measure import BASE_FEATURES, OUT, TARGET, median_runs, report, timed

MODES = ["scan", "scan_labels", "scan_labels_2", "numeric", "categorical", "absorb", "both"]
LABELS = ["zone", "pod", "host_id"]


def write_data(path: Path, rows: int, hosts: int, key_type: str = "dict") -> None:
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    import synthetic_gen

    chunk = 1_000_000
    writer = None
    tmp = path.with_suffix(".part")
    try:
        for start in range(0, rows, chunk):
            t = synthetic_gen.generate_table(min(chunk, rows - start), seed=4, start_row=start, hosts=hosts)
            rng = np.random.default_rng(start)  # labels that vary within a host, as a job class would
            for name, levels in (("zone", [f"z{v}" for v in range(8)]), ("pod", [f"p{v:02d}" for v in range(50)])):
                codes = pa.array(rng.integers(0, len(levels), t.num_rows), type=pa.int32())
                # stored as Arrow dictionaries, like host_id (and like any categorical column
                # written from a data frame), so they read back without materialising strings
                t = t.append_column(name, pa.DictionaryArray.from_arrays(codes, pa.array(levels)))
            if key_type == "int":  # host_id as the host's number ("h012345" -> 12345), int32
                h = t.column("host_id").combine_chunks()
                if pa.types.is_dictionary(h.type):
                    h = h.dictionary_decode()
                number = pc.cast(pc.utf8_slice_codeunits(h, 1), pa.int32())
                t = t.set_column(t.schema.get_field_index("host_id"), "host_id", number)
            if writer is None:
                writer = pq.ParquetWriter(tmp, t.schema, compression="zstd")
            writer.write_table(t, row_group_size=256_000)
    finally:
        if writer is not None:
            writer.close()
    os.replace(tmp, path)


def scan_columns(path: str, columns: list[str], labels: list[str], threads: int = 1) -> None:
    """The floor: pyarrow iter_batches of ``columns`` into float64 buffers and of ``labels`` (their
    dictionary indices, or the integers) to numpy, pre-buffering off; with ``threads`` > 1, each
    thread reads its share of the row groups (every threads-th), pyarrow's own threads off."""
    import threading

    import pyarrow.parquet as pq

    if threads > 1:
        groups = pq.ParquetFile(path).num_row_groups
        workers = [threading.Thread(target=_scan_groups, args=(path, columns, labels, list(range(k, groups, threads))))
                   for k in range(threads)]
        for t in workers:
            t.start()
        for t in workers:
            t.join()
        return
    _scan_groups(path, columns, labels, None)


def _scan_groups(path: str, columns: list[str], labels: list[str], groups: list[int] | None) -> None:
    import numpy as np
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path, pre_buffer=False, buffer_size=256 << 10)
    for rb in pf.iter_batches(batch_size=65_536, columns=columns + labels, row_groups=groups,
                              use_threads=groups is None):
        buf = np.empty((rb.num_rows, len(columns)), order="F")
        for j, c in enumerate(columns):
            buf[:, j] = rb.column(c).to_numpy(zero_copy_only=False)
        for c in labels:
            col = rb.column(c)
            (col.indices if hasattr(col, "indices") else col).to_numpy(zero_copy_only=False)


def run_one(mode: str, path: str) -> dict:
    """One measurement in this process (timed after the imports)."""
    import tallfit

    tallfit.fit  # noqa: B018 - resolve the lazy import before timing
    if mode.startswith("scan"):
        def work():
            scan_columns(path, list(BASE_FEATURES) + [TARGET], LABELS if mode != "scan" else [],
                         threads=2 if mode == "scan_labels_2" else 1)

        # a floor is a lower bound: timed after one scan, which leaves the allocator warm
        warmup, _ = timed(work)
    else:
        kwargs = {}
        if mode in ("categorical", "both"):
            kwargs["categorical"] = ["zone", "pod"]
        if mode in ("absorb", "both"):
            kwargs["absorb"] = "host_id"

        def work():
            tallfit.fit(path, TARGET, list(BASE_FEATURES), **kwargs)

        # as bench_fit.py: one fit of the first rows first pays the once-per-process costs (numba
        # cache loads of this mode's kernels, lazy imports), reported as warmup_s
        from bench_fit import _head

        label_cols = list(kwargs.get("categorical", [])) + ([kwargs["absorb"]] if "absorb" in kwargs else [])
        # 200,000 rows: with 10^5 absorbed levels a smaller head has fewer rows than coefficients
        head = _head(path, list(BASE_FEATURES) + [TARGET] + label_cols, rows=200_000)
        warmup, _ = timed(lambda: tallfit.fit(head, TARGET, list(BASE_FEATURES), **kwargs))

    cpu = time.process_time()
    seconds, _ = timed(work)
    out = {"seconds": seconds, "cpu_seconds": time.process_time() - cpu}
    out["warmup_s"] = warmup
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--hosts", type=int, default=100_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dir", default=str(OUT))
    ap.add_argument("--key-type", choices=["dict", "int"], default="dict",
                    help="host_id as string labels in a Parquet dictionary (default) or as int32 host numbers")
    ap.add_argument("--run", nargs=2, metavar=("MODE", "PATH"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.run:
        report(run_one(*args.run))
        return 0
    folder = Path(args.dir)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"design-{args.rows}-{args.hosts}-{args.key_type}.parquet"
    if not path.exists():
        t0 = time.perf_counter()
        write_data(path, args.rows, args.hosts, args.key_type)
        print(f"wrote {path.name} ({path.stat().st_size / 1e6:.0f} MB) in {time.perf_counter() - t0:.0f} s")
    results = {m: median_runs("bench_design.py", ["--run", m, str(path)], args.repeats) for m in MODES}
    base = results["numeric"]["seconds"]
    scan = results["scan"]["seconds"]
    print(f"\n{args.rows:,} rows, zone 8 levels, pod 50 levels, host_id {args.hosts:,} levels "
          f"({'int32 numbers' if args.key_type == 'int' else 'string dictionary'}); "
          f"median of {args.repeats}")
    cpu_base = results["numeric"]["cpu_seconds"]
    print(f"{'run':12s} {'seconds':>8s} {'× numeric':>10s} {'× scan':>8s} {'CPU s':>7s} {'CPU × numeric':>14s} "
          f"{'peak RSS MB':>12s} {'warm-up s':>10s}")
    for m in MODES:
        r = results[m]
        print(f"{m:12s} {r['seconds']:8.2f} {r['seconds'] / base:10.2f} {r['seconds'] / scan:8.2f} "
              f"{r['cpu_seconds']:7.2f} {r['cpu_seconds'] / cpu_base:14.2f} {r['peak_rss_mb']:12.0f} "
              f"{r.get('warmup_s', float('nan')):10.2f}")
    both, floor = results["both"]["seconds"], results["scan_labels"]["seconds"]
    floor2 = results["scan_labels_2"]["seconds"]
    print(f"\nboth ÷ scan_labels (its own decode floor): {both / floor:.2f}; "
          f"scan_labels ÷ scan: {floor / scan:.2f} (the label columns' decode alone)")
    print(f"scan_labels_2 ÷ numeric: {floor2 / base:.2f} (decoding the columns of 'both' on two threads, "
          f"before any categorical or absorbed work, against the 1.5 budget)")
    print("target: categorical and absorbed (both) at most 1.5× the numeric fit")
    return 0


if __name__ == "__main__":
    sys.exit(main())
