"""JSON lines reader: one object per line; types inferred from the first file's leading block."""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterator

import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.json as pajson

from tallfit.errors import DataSourceError

from .base import Located
from .text import (BAD_STATUS, ENGINES, LEAD_BYTES, NULL_TOKENS, LineBlocks, block_target, convert, nan_to_null,
                   open_text, polars_type, stream_batches, text_type)

#: Parser used by default; chosen by bench/bench_readers.py (see README.md in this folder).
DEFAULT_ENGINE = "polars"
_BAD_STATUS = BAD_STATUS


def _pl_json_type(t: pa.DataType) -> pl.DataType:
    return pl.Boolean if pa.types.is_boolean(t) else polars_type(t)


def _null_tokens(arr: pa.Array) -> pa.Array:
    """Text cells such as 'NA' or 'NaN' -> null."""
    return pc.if_else(pc.is_in(arr, value_set=pa.array(NULL_TOKENS, arr.type)), pa.scalar(None, arr.type), arr)


def _objects(loc: Located, data: bytes, row: int) -> list[dict]:
    """Decode each non-blank line; the first malformed one is reported with its data row."""
    out = []
    for line in data.split(b"\n"):
        if not line.strip():
            continue
        try:
            obj = json.loads(line)
        except ValueError as err:
            raise DataSourceError(f"{loc.path}: data row {row + len(out):,} is not valid JSON ({err}); "
                                  f"expected one JSON object per line") from None
        if not isinstance(obj, dict):
            raise DataSourceError(f"{loc.path}: data row {row + len(out):,} is a JSON {type(obj).__name__}, "
                                  f"not an object; JSON lines need one object per line")
        out.append(obj)
    return out


def _as_text(v: object) -> str | None:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return None
    return v if isinstance(v, str) else json.dumps(v)


def _python_type(values: list) -> pa.DataType:
    """Column type from decoded JSON values; numbers written as text count as numbers."""
    present = [v for v in values if _as_text(v) is not None and not (isinstance(v, str) and v in NULL_TOKENS)]
    if not present:
        return pa.null()
    if all(isinstance(v, bool) for v in present):
        return pa.bool_()
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in present):
        return pa.float64()
    if all(isinstance(v, (str, int, float)) and not isinstance(v, bool) for v in present):
        try:
            pa.array([_as_text(v) for v in present], pa.string()).cast(pa.float64())
            return pa.float64()
        except (pa.ArrowException, ValueError):
            return pa.string()
    try:
        return pa.array(present).type
    except (pa.ArrowException, TypeError, ValueError):
        return pa.string()


class JsonlReader:
    """Streams newline-delimited JSON; keys absent from a line (or a file) are read as null."""

    strict_columns = False
    inferred = True

    def __init__(self, engine: str | None = None) -> None:
        self.engine = engine or DEFAULT_ENGINE
        if self.engine not in ENGINES:
            raise DataSourceError(f"unknown JSON engine {self.engine!r}; use one of {', '.join(ENGINES)}")

    # ---- inference
    def _infer(self, loc: Located, data: bytes) -> pa.Schema:
        if not data.strip():
            return pa.schema([])
        try:
            schema = pajson.read_json(pa.BufferReader(data)).schema
        except _BAD_STATUS:   # e.g. "NA" text among numbers: decide per column from Python's json
            rows = _objects(loc, data, 0)
            keys = list(dict.fromkeys(k for r in rows for k in r))
            schema = pa.schema([(k, _python_type([r.get(k) for r in rows])) for k in keys])
        return pa.schema([(f.name, text_type(f.type)) for f in schema])

    def file_schema(self, loc: Located, infer: bool) -> pa.Schema | None:
        if not infer:
            return None
        with open_text(loc) as stream:
            return self._infer(loc, LineBlocks(stream, loc).take(LEAD_BYTES))

    # ---- streaming
    def read(self, loc: Located, columns: list[str], types: dict[str, pa.DataType], batch_rows: int,
             check: Callable[[pa.Schema], None] | None) -> Iterator[pa.RecordBatch]:
        with open_text(loc) as stream:
            blocks = LineBlocks(stream, loc)
            data = blocks.take(LEAD_BYTES)
            if check is not None:
                check(self._infer(loc, data))
            if self.engine == "pyarrow-stream":
                yield from self._read_stream(loc, data, columns, types, batch_rows)
                return
            row = 0
            while data:
                rb = self._parse(loc, data, columns, types, row)
                if rb is not None:
                    yield rb
                    row += rb.num_rows
                    blocks.rows_done = row
                data = blocks.take(block_target(len(data), rb.num_rows if rb else 0, batch_rows))

    def _parse(self, loc, data, columns, types, row) -> pa.RecordBatch | None:
        """Fast parser first; Python's json as the fallback for NaN tokens, numbers written as text
        and for locating malformed lines."""
        tries = [self._parse_polars, self._parse_pyarrow] if self.engine == "polars" else [self._parse_pyarrow]
        for attempt in tries:
            try:
                return attempt(loc, data, columns, types, row)
            except DataSourceError:
                raise
            except _BAD_STATUS:
                pass
        return self._parse_python(loc, data, columns, types, row)

    def _finish(self, table: pa.Table, loc, columns, types, row) -> pa.RecordBatch | None:
        if table.num_rows == 0:
            return None
        arrays = []
        for c in columns:
            arr = nan_to_null(convert(table.column(c), types[c], loc, c, row, None))
            arrays.append(_null_tokens(arr) if pa.types.is_string(arr.type) else arr)
        return pa.RecordBatch.from_arrays(arrays, names=columns)

    def _parse_polars(self, loc, data, columns, types, row):
        df = pl.read_ndjson(data, schema={c: _pl_json_type(types[c]) for c in columns})
        return self._finish(df.to_arrow(), loc, columns, types, row)

    def _parse_opts(self, columns, types) -> pajson.ParseOptions:
        return pajson.ParseOptions(explicit_schema=pa.schema([(c, types[c]) for c in columns]),
                                   unexpected_field_behavior="ignore")

    def _parse_pyarrow(self, loc, data, columns, types, row):
        table = pajson.read_json(pa.BufferReader(data), parse_options=self._parse_opts(columns, types))
        return self._finish(table, loc, columns, types, row)

    def _parse_python(self, loc, data, columns, types, row):
        """Slow path: decode lines with Python's json, blank missing markers, convert with row reporting."""
        rows = _objects(loc, data, row)
        if not rows:
            return None
        arrays = []
        for c in columns:
            values = [r.get(c) for r in rows]
            if pa.types.is_nested(types[c]):
                try:
                    arr = pa.array(values, type=types[c])
                except (pa.ArrowException, TypeError, ValueError) as exc:
                    raise DataSourceError(f"{loc.path}: column {c!r} in data rows from {row:,} does not fit "
                                          f"{types[c]} ({exc})") from None
            else:
                arr = _null_tokens(pa.array([_as_text(v) for v in values], pa.string()))
            arrays.append(nan_to_null(convert(arr, types[c], loc, c, row, None)))
        return pa.RecordBatch.from_arrays(arrays, names=columns)

    def _read_stream(self, loc, head, columns, types, batch_rows):
        """pyarrow's own streaming JSON reader on a fresh stream (kept for the benchmark)."""
        rows = max(1, head.count(b"\n"))
        opts = pajson.ReadOptions(block_size=block_target(len(head), rows, batch_rows))
        with open_text(loc) as fresh:
            try:
                reader = pajson.open_json(fresh, read_options=opts, parse_options=self._parse_opts(columns, types))
            except _BAD_STATUS as exc:
                raise DataSourceError(f"{loc.path}: cannot read JSON lines ({exc})") from None
            for rb in stream_batches(reader, loc, _BAD_STATUS):
                yield pa.RecordBatch.from_arrays([nan_to_null(rb.column(c)) for c in columns], names=columns)
