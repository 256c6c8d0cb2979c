"""CSV/TSV reader: types inferred once from the leading block, then every block parsed with those types."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import polars as pl
import pyarrow as pa
import pyarrow.csv as pacsv

from tallfit.errors import DataSourceError, SchemaError

from .base import Located
from .text import (BAD_STATUS, ENGINES, LEAD_BYTES, MIN_BLOCK, NULL_TOKENS, LineBlocks, block_target, convert,
                   find_bad, first_line_end, open_text, polars_type, stream_batches, text_type, bad_value_error)

#: Parser used by default; chosen by bench/bench_readers.py (see README.md in this folder).
DEFAULT_ENGINE = "pyarrow"
QUOTE = b'"'
_BAD_STATUS = BAD_STATUS


def normalize_delimiter(delimiter: str) -> str:
    """One-character delimiter; accepts 'tab' and a literal backslash-t."""
    d = {"\\t": "\t", "tab": "\t"}.get(delimiter, delimiter)
    if not isinstance(d, str) or len(d) != 1 or d in "\"\r\n":
        raise DataSourceError(f"delimiter must be a single character such as ',', ';' or '\\t', got {delimiter!r}")
    return d


class CsvReader:
    """Streams CSV files with a header row; .tsv files default to tab when the delimiter is left at ','."""

    strict_columns = True
    inferred = True

    def __init__(self, delimiter: str = ",", engine: str | None = None) -> None:
        self.delimiter = normalize_delimiter(delimiter)
        self.engine = engine or DEFAULT_ENGINE
        if self.engine not in ENGINES:
            raise DataSourceError(f"unknown CSV engine {self.engine!r}; use one of {', '.join(ENGINES)}")

    def _delim(self, loc: Located) -> str:
        tsv = ".tsv" in loc.path.lower().rsplit("/", 1)[-1]
        return "\t" if tsv and self.delimiter == "," else self.delimiter

    # ---- header and inference
    def _header(self, loc: Located, line: bytes) -> list[str]:
        if not line.strip():
            raise DataSourceError(f"{loc.path}: empty file; a CSV file needs a header row naming its columns")
        try:
            names = pacsv.read_csv(pa.BufferReader(line), parse_options=self._parse_opts(loc, line)).column_names
        except _BAD_STATUS as exc:
            raise DataSourceError(f"{loc.path}: cannot read the header row ({exc})") from None
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise SchemaError(f"{loc.path}: column name(s) {', '.join(map(repr, dup))} appear more than once "
                              f"in the header; rename them so each column is unique")
        return names

    def _parse_opts(self, loc: Located, data: bytes) -> pacsv.ParseOptions:
        return pacsv.ParseOptions(delimiter=self._delim(loc), newlines_in_values=QUOTE in data)

    def _head(self, loc: Located, nbytes: int) -> tuple[list[str], bytes]:
        with open_text(loc) as stream:
            block = LineBlocks(stream, loc, QUOTE).take(nbytes)
        cut = first_line_end(block)
        return self._header(loc, block[:cut]), block[cut:]

    def _infer(self, loc: Located, names: list[str], data: bytes) -> pa.Schema:
        if not data.strip():
            return pa.schema([(n, pa.null()) for n in names])
        try:
            table = pacsv.read_csv(
                pa.BufferReader(data), read_options=pacsv.ReadOptions(column_names=names),
                parse_options=self._parse_opts(loc, data),
                convert_options=pacsv.ConvertOptions(null_values=NULL_TOKENS, strings_can_be_null=True,
                                                     quoted_strings_can_be_null=True))
        except _BAD_STATUS as exc:
            raise DataSourceError(f"{loc.path}: malformed CSV in the first rows ({exc}); check the delimiter "
                                  f"({self._delim(loc)!r}) and that every line has {len(names)} fields") from None
        return pa.schema([(f.name, text_type(f.type)) for f in table.schema])

    def file_schema(self, loc: Located, infer: bool) -> pa.Schema:
        names, data = self._head(loc, LEAD_BYTES if infer else MIN_BLOCK)
        if not infer:
            return pa.schema([(n, pa.null()) for n in names])
        return self._infer(loc, names, data)

    # ---- streaming
    def read(self, loc: Located, columns: list[str], types: dict[str, pa.DataType], batch_rows: int,
             check: Callable[[pa.Schema], None] | None) -> Iterator[pa.RecordBatch]:
        if self.engine == "pyarrow-stream":
            yield from self._read_stream(loc, columns, types, batch_rows, check)
            return
        parse = self._parse_polars if self.engine == "polars" else self._parse_pyarrow
        with open_text(loc) as stream:
            blocks = LineBlocks(stream, loc, QUOTE)
            data = blocks.take(LEAD_BYTES)
            cut = first_line_end(data)
            names = self._header(loc, data[:cut])
            data = data[cut:]
            if check is not None:
                check(self._infer(loc, names, data))
            row = 0
            while data:
                try:
                    rb = parse(loc, data, names, columns, types, row)
                except DataSourceError:
                    raise
                except _BAD_STATUS as exc:
                    raise self._diagnose(loc, data, names, columns, types, row, exc) from None
                if rb is not None:
                    yield rb
                    row += rb.num_rows
                    blocks.rows_done = row
                data = blocks.take(block_target(len(data), rb.num_rows if rb else 0, batch_rows))

    def _finish(self, table: pa.Table, loc: Located, columns: list[str], types: dict[str, pa.DataType],
                row: int) -> pa.RecordBatch | None:
        if table.num_rows == 0:
            return None
        arrays = [convert(table.column(c), types[c], loc, c, row, 2) for c in columns]
        return pa.RecordBatch.from_arrays(arrays, names=columns)

    def _parse_polars(self, loc, data, names, columns, types, row):
        wanted = set(columns)
        schema = {n: (polars_type(types[n]) if n in wanted else pl.String) for n in names}
        df = pl.read_csv(data, has_header=False, schema=schema, columns=[names.index(c) for c in columns],
                         separator=self._delim(loc), null_values=NULL_TOKENS, quote_char='"',
                         raise_if_empty=False)
        return self._finish(df.to_arrow(), loc, columns, types, row)

    def _convert_opts(self, columns, types) -> pacsv.ConvertOptions:
        return pacsv.ConvertOptions(column_types={c: types[c] for c in columns}, include_columns=columns,
                                    null_values=NULL_TOKENS, strings_can_be_null=True,
                                    quoted_strings_can_be_null=True)

    def _parse_pyarrow(self, loc, data, names, columns, types, row):
        table = pacsv.read_csv(pa.BufferReader(data), read_options=pacsv.ReadOptions(column_names=names),
                               parse_options=self._parse_opts(loc, data),
                               convert_options=self._convert_opts(columns, types))
        return self._finish(table, loc, columns, types, row)

    def _diagnose(self, loc, data, names, columns, types, row, exc) -> DataSourceError:
        """Re-read a failed block as text to name the column and row of the first bad value."""
        last = row + data.count(b"\n")
        approx = f"rows {row:,} to about {last:,}"
        try:
            table = pacsv.read_csv(
                pa.BufferReader(data), read_options=pacsv.ReadOptions(column_names=names),
                parse_options=self._parse_opts(loc, data),
                convert_options=self._convert_opts(columns, {c: pa.string() for c in columns}))
        except _BAD_STATUS as exc2:
            return DataSourceError(f"{loc.path}: malformed CSV in {approx} ({exc2}); check quoting, the "
                                   f"delimiter ({self._delim(loc)!r}) and that every line has {len(names)} fields")
        for c in columns:
            target = types[c]
            if pa.types.is_string(target) or pa.types.is_large_string(target):
                continue
            arr = table.column(c).combine_chunks()
            idx = find_bad(arr, target)
            if idx is not None:
                return bad_value_error(loc, c, arr[idx].as_py(), row + idx, target, row + idx + 2)
        return DataSourceError(f"{loc.path}: cannot parse {approx} ({exc})")

    def _read_stream(self, loc, columns, types, batch_rows, check):
        """pyarrow's own streaming CSV reader (kept for comparison in the benchmark)."""
        names, data = self._head(loc, LEAD_BYTES)
        if check is not None:
            check(self._infer(loc, names, data))
        rows_in_head = max(1, data.count(b"\n"))
        read_opts = pacsv.ReadOptions(block_size=block_target(len(data), rows_in_head, batch_rows))
        with open_text(loc) as stream:
            try:
                reader = pacsv.open_csv(stream, read_options=read_opts,
                                        parse_options=self._parse_opts(loc, data),
                                        convert_options=self._convert_opts(columns, types))
            except _BAD_STATUS as exc:
                raise DataSourceError(f"{loc.path}: cannot read CSV ({exc})") from None
            yield from stream_batches(reader, loc, _BAD_STATUS)
