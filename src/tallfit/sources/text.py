"""Helpers shared by the text readers (CSV, JSON lines): line-aligned byte blocks, type mapping, bad-value search."""

from __future__ import annotations

from collections.abc import Iterator

import pyarrow as pa
import pyarrow.compute as pc
import polars as pl

from tallfit.errors import DataSourceError

from .base import Located

#: Cell texts read as missing in text formats.
NULL_TOKENS = ["", "NA", "N/A", "null", "NULL", "NaN", "nan"]
LEAD_BYTES = 1 << 20          # leading block used for type inference
MIN_BLOCK = 64 << 10
MAX_BLOCK = 256 << 20
ENGINES = ("polars", "pyarrow", "pyarrow-stream")


def open_text(loc: Located) -> pa.NativeFile:
    """Open a (possibly gzip/zstd compressed) text file as a decompressing input stream."""
    try:
        return loc.fs.open_input_stream(loc.fs_path, compression=loc.compression)
    except (OSError, pa.ArrowException) as exc:
        raise DataSourceError(f"{loc.path}: cannot open file ({exc})") from None


class LineBlocks:
    """Cuts a byte stream into blocks that end at a line break outside quotes (RFC 4180 doubled quotes)."""

    def __init__(self, stream: pa.NativeFile, loc: Located, quote: bytes | None = None) -> None:
        self._stream, self._loc, self._quote = stream, loc, quote
        self._rest = b""
        self._eof = False
        self.offset = 0     # (decompressed) bytes handed out so far
        self.rows_done = 0  # data rows the reader has parsed so far, for error messages

    def _read(self, n: int) -> bytes:
        try:
            data = self._stream.read(n)
        except (OSError, pa.ArrowException) as exc:
            raise DataSourceError(f"{self._loc.path}: read failed after data row {self.rows_done:,} "
                                  f"({self.offset:,} bytes of text) ({exc}); the file may be corrupt or "
                                  f"truncated") from None
        if not data:
            self._eof = True
        return data

    def _cut(self, buf: bytes) -> int:
        """Index just after the last line break that is outside quotes, or 0 if none."""
        pos = buf.rfind(b"\n")
        if pos < 0 or self._quote is None or self._quote not in buf:
            return pos + 1
        odd = buf.count(self._quote, 0, pos + 1) % 2
        while odd and pos >= 0:
            prev = buf.rfind(b"\n", 0, pos)
            odd ^= buf.count(self._quote, prev + 1, pos + 1) % 2
            pos = prev
        return pos + 1

    def take(self, size: int) -> bytes:
        """Next block of about `size` bytes (longer if a line is longer); b'' at the end."""
        parts, have = [self._rest], len(self._rest)
        while have < size and not self._eof:
            chunk = self._read(max(size - have, MIN_BLOCK))
            parts.append(chunk)
            have += len(chunk)
        buf = b"".join(parts)
        while not self._eof:
            cut = self._cut(buf)
            if cut:
                self._rest = buf[cut:]
                self.offset += cut
                return buf[:cut]
            buf += self._read(max(len(buf), MIN_BLOCK))
        self._rest = b""
        self.offset += len(buf)
        return buf


def first_line_end(block: bytes, quote: bytes = b'"') -> int:
    """Index just after the first line break outside quotes (len(block) if there is none)."""
    start = 0
    odd = 0
    while True:
        pos = block.find(b"\n", start)
        if pos < 0:
            return len(block)
        odd ^= block.count(quote, start, pos) % 2
        if not odd:
            return pos + 1
        start = pos + 1


def text_type(t: pa.DataType) -> pa.DataType:
    """Data-set type for a type inferred from text: numbers become float64 so later blocks cannot break it."""
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        return pa.float64()
    if pa.types.is_large_string(t) or pa.types.is_string_view(t) or pa.types.is_binary(t) \
            or pa.types.is_large_binary(t):
        return pa.string()
    return t


def block_target(nbytes: int, nrows: int, batch_rows: int) -> int:
    """Bytes to read next so that a block holds a little under batch_rows rows."""
    if nrows <= 0:
        return LEAD_BYTES
    return int(min(MAX_BLOCK, max(MIN_BLOCK, nbytes / nrows * batch_rows * 0.97)))


def polars_type(t: pa.DataType) -> pl.DataType:
    """Polars dtype to parse a column as; temporal and other types are parsed as text and cast by pyarrow."""
    if pa.types.is_floating(t):
        return pl.Float64
    if pa.types.is_integer(t):
        return pl.Int64
    if pa.types.is_nested(t):
        return pl.from_arrow(pa.array([], type=t)).dtype
    return pl.String


def find_bad(arr: pa.Array, target: pa.DataType) -> int | None:
    """Index of the first value of a text column that cannot be cast to target (None if all can)."""
    def ok(a: pa.Array) -> bool:
        try:
            a.cast(target)
            return True
        except (pa.ArrowException, ValueError):
            return False

    if ok(arr):
        return None
    lo, hi = 0, len(arr)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if ok(arr.slice(lo, mid - lo)):
            lo = mid
        else:
            hi = mid
    return lo


def nan_to_null(arr: pa.Array) -> pa.Array:
    """Float NaN -> null (text formats treat NaN as missing)."""
    if pa.types.is_floating(arr.type) and arr.null_count < len(arr):
        nan = pc.is_nan(arr)
        if pc.any(nan).as_py():
            return pc.if_else(nan, pa.scalar(None, arr.type), arr)
    return arr


def bad_value_error(loc: Located, column: str, value: object, row: int, target: pa.DataType,
                    line: int | None = None) -> DataSourceError:
    """The error for a cell that does not fit its column's type."""
    where = f"data row {row:,}" + (f" (line {line:,})" if line is not None else "")
    return DataSourceError(
        f"{loc.path}: column {column!r}: value {value!r} at {where} is not a valid {target}; "
        f"correct or blank it, or read the column as text with columns_hint={{{column!r}: 'string'}}")


def convert(arr: pa.Array, target: pa.DataType, loc: Located, column: str, row: int,
            line_offset: int | None) -> pa.Array:
    """Cast a parsed column to its data-set type; a failing cell is reported with its row."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if arr.type.equals(target):
        return arr
    try:
        return arr.cast(target)
    except (pa.ArrowException, ValueError) as exc:
        idx = find_bad(arr, target)
        if idx is None:
            raise DataSourceError(f"{loc.path}: column {column!r} cannot be converted to {target} "
                                  f"in data rows from {row:,} ({exc})") from None
        line = None if line_offset is None else row + idx + line_offset
        raise bad_value_error(loc, column, arr[idx].as_py(), row + idx, target, line) from None


#: What the text parsers raise on unreadable input.
BAD_STATUS = (pa.ArrowException, pl.exceptions.PolarsError, OSError, ValueError)


def stream_batches(reader, loc: Located, bad_status: tuple = BAD_STATUS) -> Iterator[pa.RecordBatch]:
    """Batches of one of pyarrow's streaming readers, a parse failure named with file and row."""
    row = 0
    while True:
        try:
            rb = reader.read_next_batch()
        except StopIteration:
            return
        except bad_status as exc:
            raise DataSourceError(f"{loc.path}: cannot parse data after row {row:,} ({exc})") from None
        yield rb
        row += rb.num_rows
