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

    def _open(self, loc: Located) -> tuple[pa.NativeFile, pq.ParquetFile]:
        local = isinstance(loc.fs, pafs.LocalFileSystem)
        try:
            f = loc.fs.open_input_file(loc.fs_path)
        except _BAD_STATUS as exc:
            raise DataSourceError(f"{loc.path}: cannot open file ({exc})") from None
        try:
            return f, pq.ParquetFile(f, pre_buffer=False, buffer_size=BUFFER_LOCAL if local else BUFFER_REMOTE)
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

    def read(self, loc: Located, columns: list[str], types: dict[str, pa.DataType], batch_rows: int,
             check: Callable[[pa.Schema], None] | None) -> Iterator[pa.RecordBatch]:
        f, pf = self._open(loc)
        with f:
            total = pf.metadata.num_rows
            row = 0
            batches = pf.iter_batches(batch_size=batch_rows, columns=columns, use_threads=True)
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
                raise DataSourceError(f"{loc.path}: the footer promises {total:,} rows but {row:,} were read; "
                                      f"the file is corrupt")
