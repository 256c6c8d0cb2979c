"""Rows per second of each reader, through the same code path as tallfit.sources.Source.batches.

Generates a server-telemetry table (power draw plus 20 numeric metrics, all float) in a temporary
directory, writes it as Parquet, CSV, JSON lines and Arrow IPC, then streams every column of each file
with every available engine: median of --repeats runs, plus the peak of pyarrow's memory pool.

    PYTHONPATH=src python bench/bench_readers.py --rows 2000000
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.feather as feather
import pyarrow.parquet as pq

from tallfit.sources import open_source

METRICS = ["cpu_load", "mem_bw", "disk_read", "disk_write", "net_rx", "net_tx", "inlet_temp",
           "fan_rpm", "gpu_util", "psu_temp"]


def telemetry(rows: int, seed: int = 7) -> pa.Table:
    """20 metrics (mean and p95 of 10 signals) and the power draw they explain."""
    rng = np.random.default_rng(seed)
    cols = {}
    for m in METRICS:
        base = rng.gamma(4.0, 10.0, rows)
        cols[f"{m}_mean"] = np.round(base, 3)
        cols[f"{m}_p95"] = np.round(base * rng.uniform(1.0, 1.6, rows), 3)
    power = 120 + sum(0.8 * cols[f"{m}_mean"] for m in METRICS) + rng.normal(0, 15, rows)
    cols["power_w"] = np.round(power, 2)
    return pa.table(cols)


def write_all(table: pa.Table, folder: Path) -> dict[str, Path]:
    paths = {"parquet": folder / "fleet.parquet", "csv": folder / "fleet.csv",
             "jsonl": folder / "fleet.jsonl", "ipc": folder / "fleet.arrow"}
    pq.write_table(table, paths["parquet"])
    pacsv.write_csv(table, paths["csv"])
    pl.from_arrow(table).write_ndjson(paths["jsonl"])
    feather.write_feather(table, paths["ipc"])
    return paths


def run_once(path: Path, engine: str | None, columns: list[str], batch_rows: int) -> tuple[float, int, int]:
    source = open_source(path)
    if engine is not None:
        source._use_engine(engine)
    base = pa.total_allocated_bytes()
    peak = rows = 0
    t0 = time.perf_counter()
    for chunk in source.batches(columns, batch_rows=batch_rows):
        rows += chunk.batch.num_rows
        peak = max(peak, pa.total_allocated_bytes() - base)
    return time.perf_counter() - t0, rows, peak


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--batch-rows", type=int, default=65536)
    ap.add_argument("--formats", default="parquet,csv,jsonl,ipc")
    args = ap.parse_args()
    table = telemetry(args.rows)
    engines = {"parquet": [None], "ipc": [None], "csv": ["polars", "pyarrow", "pyarrow-stream"],
               "jsonl": ["polars", "pyarrow", "pyarrow-stream"]}
    with tempfile.TemporaryDirectory() as tmp:
        paths = write_all(table, Path(tmp))
        print(f"{args.rows:,} rows x {table.num_columns} float columns, batch_rows={args.batch_rows:,}, "
              f"median of {args.repeats}")
        print(f"{'format':8} {'engine':15} {'file MB':>8} {'M rows/s':>9} {'pool peak MB':>13}")
        for fmt in args.formats.split(","):
            size = paths[fmt].stat().st_size / 1e6
            for engine in engines[fmt]:
                runs = [run_once(paths[fmt], engine, table.column_names, args.batch_rows)
                        for _ in range(args.repeats)]
                assert all(r[1] == args.rows for r in runs), "row count mismatch"
                secs = statistics.median(r[0] for r in runs)
                peak = max(r[2] for r in runs) / 1e6
                print(f"{fmt:8} {engine or 'pyarrow':15} {size:8.0f} {args.rows / secs / 1e6:9.2f} {peak:13.1f}",
                      flush=True)


if __name__ == "__main__":
    main()
