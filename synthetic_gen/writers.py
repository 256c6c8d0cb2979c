"""Chunked writers per format; every file is written under a temporary name and renamed."""

from __future__ import annotations

import json
import os
import secrets
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import polars as pl
import pyarrow as pa
import pyarrow.ipc  # noqa: F401  (pa.ipc)
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

FORMATS = ("parquet", "parquet-plain", "csv", "jsonl", "ipc")
TEXT_FORMATS = ("csv", "jsonl")
_DICTIONARY_COLUMNS = ("ts", "day", "host_id", "rack", "region", "machine_class")
_NO_STATISTICS = ("day", "host_id", "rack", "region", "machine_class")  # costly, and ts already orders rows


@contextmanager
def atomic_path(final: Path) -> Iterator[Path]:
    """Yield a temporary path beside ``final``; rename it over ``final`` only on success."""
    tmp = final.with_name(f".{final.name}.{os.getpid()}-{secrets.token_hex(4)}.tmp")
    try:
        yield tmp
        os.replace(tmp, final)
    finally:
        if tmp.exists():
            tmp.unlink()


class _Parquet:
    def __init__(self, path: Path, compression: str) -> None:
        self._path, self._compression, self._writer = path, compression, None

    def write(self, table: pa.Table) -> None:
        if self._writer is None:
            self._writer = pq.ParquetWriter(
                self._path,
                table.schema,
                compression=self._compression,
                use_dictionary=[c for c in _DICTIONARY_COLUMNS if c in table.column_names],
                write_statistics=[c for c in table.column_names if c not in _NO_STATISTICS],
                store_schema=False,  # label columns read back as plain strings
            )
        self._writer.write_table(table, row_group_size=table.num_rows)

    def close(self) -> None:
        if self._writer is not None:
            self._writer.close()


class _Csv:
    def __init__(self, path: Path) -> None:
        self._path, self._writer = path, None

    def write(self, table: pa.Table) -> None:
        if self._writer is None:
            self._writer = pa_csv.CSVWriter(str(self._path), table.schema)
        self._writer.write_table(table)

    def close(self) -> None:
        if self._writer is not None:
            self._writer.close()


class _Jsonl:
    def __init__(self, path: Path) -> None:
        self._file = open(path, "wb")

    def write(self, table: pa.Table) -> None:
        pl.from_arrow(table).write_ndjson(self._file)

    def close(self) -> None:
        self._file.close()


class _Ipc:
    """Arrow IPC file format (uncompressed): reading it costs almost nothing, so a fit of it is
    bound by its own arithmetic (the benchmarks' compute-bound case)."""

    def __init__(self, path: Path) -> None:
        self._path, self._sink, self._writer = path, None, None

    def write(self, table: pa.Table) -> None:
        if self._writer is None:
            self._sink = pa.OSFile(str(self._path), "wb")
            self._writer = pa.ipc.new_file(self._sink, table.schema)
        self._writer.write_table(table, max_chunksize=65_536)

    def close(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._sink.close()


def _sink(fmt: str, path: Path):
    if fmt == "parquet":
        return _Parquet(path, "zstd")
    if fmt == "parquet-plain":
        return _Parquet(path, "none")
    if fmt == "csv":
        return _Csv(path)
    if fmt == "jsonl":
        return _Jsonl(path)
    if fmt == "ipc":
        return _Ipc(path)
    raise ValueError(f"unknown format {fmt!r}; choose one of {', '.join(FORMATS)}")


@contextmanager
def open_sink(fmt: str, final: Path):
    """A writer with ``.write(table)`` for chunks; the file appears at ``final`` when done."""
    with atomic_path(final) as tmp:
        sink = _sink(fmt, tmp)
        try:
            yield sink
        finally:
            sink.close()


def write_json(final: Path, payload: dict) -> None:
    """Write ``payload`` as indented JSON, atomically."""
    with atomic_path(final) as tmp:
        tmp.write_text(json.dumps(payload, indent=2) + "\n")
