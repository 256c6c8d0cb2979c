"""Bounded-memory chunked readers: Parquet, CSV/TSV, JSON lines, Arrow IPC and Python-supplied batches.

``open_source(path)`` expands files, directories (hive ``key=value`` partitions), globs and URIs into a
:class:`Source` whose ``batches(columns, batch_rows)`` streams only the named columns, in order, as
:class:`Chunk` objects holding pyarrow RecordBatches.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping

from .base import Chunk, FileInfo, Source
from .discover import discover
from .ipc import IpcReader
from .iterable import IterableSource
from .parquet import ParquetReader

__all__ = ["open_source", "Source", "Chunk", "FileInfo", "IterableSource"]


def open_source(path: str | os.PathLike | Iterable[str | os.PathLike], *, format: str | None = None,
                delimiter: str = ",", columns_hint: Mapping[str, object] | Iterable[str] | None = None) -> Source:
    """Open a file, directory, glob or URI (or a list of them) as one data set of a single format.

    ``format`` overrides detection from extensions; ``delimiter`` applies to CSV (``.tsv`` files use tab
    while it is left at ``','``); ``columns_hint`` is either a mapping column -> type ("float64", "int64",
    "string", "bool" or a pyarrow type) forcing those types, or a list of column names that must exist
    (checked now, so a typo fails before any data is read).
    """
    locs, fmt = discover(path, format)
    if str(format).strip().lower() == "tsv" and delimiter == ",":
        delimiter = "\t"
    if fmt == "parquet":
        reader = ParquetReader()
    elif fmt == "csv":  # the text readers import polars (≈ 0.2 s): only when a text file is read
        from .csv import CsvReader

        reader = CsvReader(delimiter)
    elif fmt == "jsonl":
        from .jsonl import JsonlReader

        reader = JsonlReader()
    else:
        reader = IpcReader()
    source = Source(locs, fmt, reader, columns_hint)
    if columns_hint is not None:
        source.schema  # validate the hint eagerly
    return source
