"""Parquet reader: footer-only schema, then ParquetFile.iter_batches with pre-buffering off and a
small buffered stream per column, so memory stays at a few batches whatever the row-group size."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from tallfit.errors import DataSourceError

from .base import Located

#: Read buffer per column chunk (local files); object stores get a larger one (fewer requests).
BUFFER_LOCAL = 256 << 10
BUFFER_REMOTE = 8 << 20
_BAD_STATUS = (pa.ArrowException, OSError, ValueError)


class ParquetReader:
    """Streams row groups of Parquet files batch by batch."""

    strict_columns = True
    inferred = False

    def _open(self, loc: Located, metadata=None) -> tuple[pa.NativeFile, pq.ParquetFile]:
        local = isinstance(loc.fs, pafs.LocalFileSystem)
        try:
            f = loc.fs.open_input_file(loc.fs_path)
        except _BAD_STATUS as exc:
            raise DataSourceError(f"{loc.path}: cannot open file ({exc})") from None
        try:
            return f, pq.ParquetFile(f, metadata=metadata, pre_buffer=False,
                                     buffer_size=BUFFER_LOCAL if local else BUFFER_REMOTE)
        except _BAD_STATUS as exc:
            f.close()
            raise DataSourceError(f"{loc.path}: not a readable Parquet file ({exc}); it may be truncated, "
                                  f"still being written, or of another format") from None

    def file_schema(self, loc: Located, infer: bool) -> pa.Schema:
        f, pf = self._open(loc)
        with f:
            try:
                return pf.schema_arrow.remove_metadata()
            except _BAD_STATUS as exc:
                raise DataSourceError(f"{loc.path}: unreadable Parquet schema ({exc})") from None

    def footer(self, loc: Located):
        """The file's parsed footer (pyarrow FileMetaData), to lend to later reads of the same file."""
        f, pf = self._open(loc)
        with f:
            try:
                return pf.metadata
            except _BAD_STATUS as exc:
                raise DataSourceError(f"{loc.path}: unreadable Parquet footer ({exc})") from None

    def read(self, loc: Located, columns: list[str], types: dict[str, pa.DataType], batch_rows: int,
             check: Callable[[pa.Schema], None] | None, prune=None, row_groups: tuple[int, int] | None = None,
             use_threads: bool = True, footer=None) -> Iterator[pa.RecordBatch | int]:
        """Batches of the file; with `prune`, row groups whose statistics rule out every row are
        skipped and their row count is yielded as an int instead (so row offsets stay right).

        ``row_groups`` = (first, stop) reads only those row groups; ``use_threads`` lets pyarrow
        decode the columns of a batch on several threads (off when the caller runs one reader per
        core itself); ``footer`` (from :meth:`footer`) saves parsing it again: a big file's parsed
        footer is tens of MB, and several parts of it are read at once."""
        f, pf = self._open(loc, footer)
        with f:
            meta = pf.metadata
            first, stop = (0, meta.num_row_groups) if row_groups is None else row_groups
            row = start = sum(meta.row_group(g).num_rows for g in range(first))  # rows are numbered in the file
            total = start + sum(meta.row_group(g).num_rows for g in range(first, stop))
            groups = list(range(first, stop))
            for g in groups:
                if prune is not None and not prune(_row_group_ranges(meta, g)):
                    n = meta.row_group(g).num_rows
                    row += n
                    yield n
                    continue
                batches = pf.iter_batches(batch_size=batch_rows, row_groups=[g], columns=columns,
                                          use_threads=use_threads)
                while True:
                    try:
                        rb = next(batches)
                    except StopIteration:
                        break
                    except _BAD_STATUS as exc:
                        raise DataSourceError(
                            f"{loc.path}: corrupt Parquet data after row {row:,} of {total:,} (while reading rows "
                            f"{row:,}-{min(total, row + batch_rows) - 1:,}): {exc}") from None
                    yield rb
                    row += rb.num_rows
            if row != total:
                where = "" if row_groups is None else f" in row groups {first}-{stop - 1}"
                raise DataSourceError(f"{loc.path}: the footer promises {total - start:,} rows{where} but "
                                      f"{row - start:,} were read; the file is corrupt")


def _row_group_ranges(meta, g: int) -> dict:
    """{column: (min, max)} from a row group's statistics, where the file recorded them."""
    rg = meta.row_group(g)
    out = {}
    for j in range(rg.num_columns):
        col = rg.column(j)
        st = col.statistics
        if st is not None and st.has_min_max:
            out[col.path_in_schema] = (st.min, st.max)
    return out
