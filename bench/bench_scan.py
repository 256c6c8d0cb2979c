"""Floor: the bare scan of a file into reused float64 column-major buffers, no model.

    python bench/bench_scan.py FILE P            # Parquet: pyarrow iter_batches, pre-buffering off
    python bench/bench_scan.py FILE P --csv      # CSV: tallfit's CSV reader (the fastest measured here)

Prints one JSON line: seconds, rows, rows_per_s, peak_rss_mb.
"""

from __future__ import annotations

import argparse

import numpy as np

from _measure import TARGET, features_for, report, timed

BATCH = 65_536


def fill(buffers: dict, batch, k: int) -> None:
    m = batch.num_rows
    buf = buffers.get(m)
    if buf is None:
        buf = buffers[m] = np.empty((m, k), dtype=np.float64, order="F")
    for j in range(k):
        buf[:, j] = batch.column(j).to_numpy(zero_copy_only=False)


def scan_parquet(path: str, columns: list[str]) -> int:
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path, pre_buffer=False, buffer_size=256 << 10)
    buffers: dict = {}
    rows = 0
    for rb in pf.iter_batches(batch_size=BATCH, columns=columns, use_threads=True):
        fill(buffers, rb, len(columns))
        rows += rb.num_rows
    return rows


def scan_csv(path: str, columns: list[str]) -> int:
    from tallfit.sources import open_source

    source = open_source(path)
    buffers: dict = {}
    rows = 0
    for chunk in source.batches(columns, BATCH):
        fill(buffers, chunk.batch, len(columns))
        rows += chunk.batch.num_rows
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("path")
    ap.add_argument("p", type=int)
    ap.add_argument("--csv", action="store_true")
    args = ap.parse_args()
    columns = features_for(args.p) + [TARGET]
    import pyarrow.parquet  # noqa: F401  (imports are not part of the scan)
    import tallfit.sources  # noqa: F401

    seconds, rows = timed(lambda: (scan_csv if args.csv else scan_parquet)(args.path, columns))
    report({"seconds": seconds, "rows": rows, "rows_per_s": rows / seconds})


if __name__ == "__main__":
    main()
