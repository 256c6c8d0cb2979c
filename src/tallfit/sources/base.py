"""Shared pieces of the readers: file records, chunks, schema unification and the Source class."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
import threading
from dataclasses import dataclass, field
from typing import Any, Protocol

import pyarrow as pa
import pyarrow.fs as pafs

from tallfit.errors import ColumnNotFoundError, DataSourceError, SchemaError

from .columns import cast_column, hint_type, part_value, partition_array, partition_type, unify_types

FORMAT_LABELS = {"parquet": "Parquet", "csv": "CSV", "jsonl": "JSON lines", "ipc": "Arrow IPC", "arrow": "Arrow"}


@dataclass(frozen=True)
class FileInfo:
    """One data file of a source: path as given/expanded, size in bytes, format, hive partition values."""

    path: str
    size: int
    format: str
    partition: dict[str, str] = field(default_factory=dict)


@dataclass
class Chunk:
    """A batch of the requested columns and where its first row sits (file index, 0-based row)."""

    batch: pa.RecordBatch
    file_index: int
    row_start: int


@dataclass(frozen=True)
class Located:
    """A FileInfo plus what a reader needs to open it (filesystem, path on it, compression)."""

    info: FileInfo
    fs: pafs.FileSystem
    fs_path: str
    compression: str | None = None  # "gzip" | "zstd" | None

    @property
    def path(self) -> str:
        return self.info.path


class Reader(Protocol):
    """What a format module provides to :class:`Source`."""

    #: True when a file's own column list is authoritative (a missing column is an error).
    strict_columns: bool
    #: True for text formats: types come from inference, unresolved (all-missing) columns become float64.
    inferred: bool

    def file_schema(self, loc: Located, infer: bool) -> pa.Schema | None:
        """Schema of one file from metadata or its first bytes; None if unknown without inference."""

    def read(self, loc: Located, columns: list[str], types: dict[str, pa.DataType], batch_rows: int,
             check: Callable[[pa.Schema], None] | None) -> Iterator[pa.RecordBatch]:
        """Stream `columns` of one file; raise DataSourceError naming the file and row range on failure."""


# --------------------------------------------------------------------------- helpers

def human_bytes(n: int) -> str:
    """Size with a decimal unit: 950 B, 12.3 kB, 1.2 GB."""
    size = float(n)
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if size < 1000 or unit == "TB":
            return f"{int(size)} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1000
    return f"{n} B"  # pragma: no cover


def check_batch_rows(batch_rows: Any) -> int:
    """Validate the batch size argument."""
    if isinstance(batch_rows, bool) or not isinstance(batch_rows, int) or batch_rows < 1:
        raise DataSourceError(f"batch_rows must be a positive integer, got {batch_rows!r}")
    return batch_rows


def slices(batch: pa.RecordBatch, batch_rows: int) -> Iterator[pa.RecordBatch]:
    """Zero-copy pieces of at most batch_rows rows."""
    n = batch.num_rows
    if n <= batch_rows:
        if n:
            yield batch
        return
    for start in range(0, n, batch_rows):
        yield batch.slice(start, batch_rows)


class SharedFooter:
    """A Parquet footer parsed once and lent to every part of its file, dropped after the last
    part has been read (a part read again after that parses the footer itself)."""

    def __init__(self, meta, parts: int) -> None:
        self.meta = meta
        self._left = parts
        self._lock = threading.Lock()

    def release(self) -> None:
        with self._lock:
            self._left -= 1
            if self._left <= 0:
                self.meta = None

    def __getstate__(self) -> dict:  # a part sent to another process parses the footer there
        return {"meta": None, "_left": 0}

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()


def _row_group_spans(rows: list[int], span_rows: int) -> list[tuple[int, int, int]]:
    """(first, stop, first row) runs of consecutive row groups of at least span_rows rows each
    (the last run takes what is left)."""
    spans, first, start, acc, row = [], 0, 0, 0, 0
    for g, n in enumerate(rows):
        acc += n
        row += n
        if acc >= span_rows:
            spans.append((first, g + 1, start))
            first, start, acc = g + 1, row, 0
    if first < len(rows):
        if spans and acc < span_rows // 2:  # a short tail joins the run before it
            f0, _, s0 = spans.pop()
            spans.append((f0, len(rows), s0))
        else:
            spans.append((first, len(rows), start))
    return spans


# --------------------------------------------------------------------------- Source

class Source:
    """A data set of one format: a list of files streamed in order as bounded batches."""

    def __init__(self, locs: list[Located], format: str, reader: Reader, columns_hint: Any = None) -> None:
        self._locs = locs
        self.files: list[FileInfo] = [loc.info for loc in locs]
        self.format = format
        self._reader = reader
        self._hint = columns_hint
        self._schema: pa.Schema | None = None
        self._origin: dict[str, int] = {}           # column -> index of the file that fixed its type
        self._file_columns: dict[int, list[str]] = {}
        self._checked: set[int] = set()              # files whose own types were compared to the schema
        self._part_types: dict[str, pa.DataType] = {}
        self._span: tuple[int, int, int] | None = None  # (first, stop, first row): a part of one Parquet file
        self.decode_threads = True                   # let the reader decode a batch on several threads
        self.is_part = False                         # made by parts(): not split again
        self._footer: SharedFooter | None = None     # a Parquet footer shared by the parts of one file

    # ---- schema
    @property
    def schema(self) -> pa.Schema:
        """Unified schema (hive partition columns last), from file metadata / leading bytes only."""
        if self._schema is None:
            self._schema = self._build_schema()
        return self._schema

    def _merge(self, types: dict[str, pa.DataType], schema: pa.Schema, i: int) -> None:
        for f in schema:
            old = types.get(f.name)
            if old is None:
                types[f.name] = f.type
                self._origin[f.name] = i
                continue
            new = unify_types(old, f.type)
            if new is None:
                if self._hinted(f.name):
                    continue  # the user fixed this column's type; files are cast to it
                raise self._conflict(f.name, old, f.type, i)
            if pa.types.is_null(old):
                self._origin[f.name] = i
            types[f.name] = new

    def _hinted(self, column: str) -> bool:
        return isinstance(self._hint, Mapping) and column in self._hint

    def _conflict(self, column: str, old: pa.DataType, new: pa.DataType, i: int) -> SchemaError:
        first = self.files[self._origin.get(column, 0)].path
        return SchemaError(
            f"column {column!r} has type {old} in {first} but {new} in {self.files[i].path}; "
            f"make the files agree, read a subset of files, or set the type with columns_hint")

    def _build_schema(self) -> pa.Schema:
        reader, types = self._reader, {}
        for i, loc in enumerate(self._locs):
            unresolved = not types or any(pa.types.is_null(t) for t in types.values())
            s = reader.file_schema(loc, infer=(i == 0))
            if s is not None:
                self._file_columns[i] = s.names
            if reader.inferred and i > 0 and (unresolved or (s is not None and set(s.names) - set(types))):
                s = reader.file_schema(loc, infer=True)
                self._checked.add(i)
            if i == 0:
                self._checked.add(0)
            if s is not None:
                self._merge(types, s, i)
        if reader.inferred:
            types = {k: (pa.float64() if pa.types.is_null(t) else t) for k, t in types.items()}
        fields = [pa.field(k, t) for k, t in types.items()]
        fields += self._partition_fields(set(types))
        hints = self._hint if isinstance(self._hint, Mapping) else {}
        names = [f.name for f in fields]
        wanted = [self._hint] if isinstance(self._hint, str) else list(self._hint or [])
        for col in wanted:
            if col not in names:
                raise ColumnNotFoundError(col, names, where=f"{self._where()} (columns_hint)")
        fields = [pa.field(f.name, hint_type(f.name, hints[f.name])) if f.name in hints else f for f in fields]
        return pa.schema(fields)

    def _partition_fields(self, file_cols: set[str]) -> list[pa.Field]:
        if not self.files:
            return []
        keys = list(self.files[0].partition)
        for f in self.files[1:]:
            if list(f.partition) != keys:
                raise DataSourceError(
                    f"hive partition keys differ: {self.files[0].path} has {keys or 'none'}, "
                    f"{f.path} has {list(f.partition) or 'none'}; point at one consistently partitioned tree")
        out = []
        for k in keys:
            if k in file_cols:
                raise SchemaError(f"column {k!r} is both a hive partition directory ({k}=...) and a column "
                                  f"inside the files (e.g. {self.files[0].path}); rename one of them")
            typ = partition_type([part_value(f.partition[k]) for f in self.files])
            self._part_types[k] = typ
            out.append(pa.field(k, typ))
        return out

    def _check_file(self, i: int, schema: pa.Schema) -> None:
        """Compare one text file's own inferred types with the data set's (called when it is opened)."""
        unified = self.schema
        for f in schema:
            if f.name in unified.names and not pa.types.is_null(f.type):
                target = unified.field(f.name).type
                if not self._hinted(f.name) and unify_types(target, f.type) is None:
                    raise self._conflict(f.name, target, f.type, i)
        self._checked.add(i)

    def _where(self) -> str:
        return self.files[0].path if len(self.files) == 1 else f"the data set ({self.describe()})"

    # ---- streaming
    def batches(self, columns: list[str], batch_rows: int = 65536, prune=None) -> Iterator[Chunk]:
        """Stream every file in order as Chunks of at most batch_rows rows holding only `columns`.

        ``prune`` (see tallfit.design.pushdown) is a test on {column: (min, max)}: files whose
        hive partition values, and Parquet row groups whose statistics, fail it are skipped
        unread; ``pruned_rows`` then counts the rows skipped (Parquet) in this stream.
        """
        batch_rows = check_batch_rows(batch_rows)
        columns = list(columns)
        schema = self.schema
        for c in columns:
            if c not in schema.names:
                raise ColumnNotFoundError(c, schema.names, where=self._where())
        self.pruned_rows = 0
        self.pruned_files = 0
        return self._stream(columns, batch_rows, schema, prune)

    def _partition_ranges(self, loc: Located) -> dict:
        out = {}
        for k, raw in loc.info.partition.items():
            v = part_value(raw)
            if v is not None and pa.types.is_integer(self._part_types.get(k, pa.string())):
                v = int(v)
            out[k] = (v, v)
        return out

    def _stream(self, columns: list[str], batch_rows: int, schema: pa.Schema, prune=None) -> Iterator[Chunk]:
        out_schema = pa.schema([schema.field(c) for c in columns])
        file_cols = [c for c in dict.fromkeys(columns) if c not in self._part_types]
        types = {c: schema.field(c).type for c in schema.names}
        for i, loc in enumerate(self._locs):
            have = self._file_columns.get(i)
            if self._reader.strict_columns and have is not None:
                for c in file_cols:
                    if c not in have:
                        raise ColumnNotFoundError(c, have, where=loc.path)
            # with no file column requested, read one cheap column just to count rows
            read_cols = file_cols or [have[0] if have else next(iter(types))]
            check = None if i in self._checked else (lambda s, i=i: self._check_file(i, s))
            row = 0
            if prune is not None and loc.info.partition and not prune(self._partition_ranges(loc)):
                self.pruned_files += 1
                continue
            extra = {}
            if self.format == "parquet":
                extra["use_threads"] = self.decode_threads
                if prune is not None:
                    extra["prune"] = prune
                if self._span is not None:
                    extra["row_groups"] = self._span[:2]
                    row = self._span[2]
                if self._footer is not None and self._footer.meta is not None:
                    extra["footer"] = self._footer.meta
            for rb in self._reader.read(loc, read_cols, types, batch_rows, check, **extra):
                if isinstance(rb, int):  # a row group skipped by its statistics
                    row += rb
                    self.pruned_rows += rb
                    continue
                for piece in slices(rb, batch_rows):
                    yield Chunk(self._assemble(piece, columns, out_schema, loc, row), i, row)
                    row += piece.num_rows
            if self._footer is not None:
                self._footer.release()

    def _assemble(self, piece: pa.RecordBatch, columns: list[str], out_schema: pa.Schema,
                  loc: Located, row: int) -> pa.RecordBatch:
        if not columns:
            return piece.select([])
        if not self._part_types and piece.schema.equals(out_schema):
            return piece  # the columns asked for, in order, of their unified types already
        n, arrays = piece.num_rows, []
        where = f"{loc.path} (rows {row:,}-{row + n - 1:,})"
        for c, f in zip(columns, out_schema):
            if c in self._part_types:
                arrays.append(partition_array(part_value(loc.info.partition[c]), f.type, n))
            else:
                arrays.append(cast_column(piece.column(c), f.type, c, where))
        return pa.RecordBatch.from_arrays(arrays, schema=out_schema)

    # ---- parts, for parallel passes
    def parts(self, span_rows: int = 0) -> list[tuple["Source", int]]:
        """The data set as independent parts, each a Source of its own with this one's schema,
        paired with its file's index: one part per file and, with ``span_rows`` > 0, Parquet files
        split into runs of whole row groups of at least that many rows. The split depends on the
        files only, so passes that merge per-part results in this order give the same answer
        whatever the number of workers."""
        if self.is_part:
            return [(self, 0)]
        schema = self.schema
        out: list[tuple[Source, int]] = []
        for i, loc in enumerate(self._locs):
            spans, footer = [None], None
            if span_rows > 0 and self.format == "parquet":
                meta = self._reader.footer(loc)
                rows = [meta.row_group(g).num_rows for g in range(meta.num_row_groups)]
                spans = _row_group_spans(rows, span_rows) or [None]
                if len(spans) > 1:
                    footer = SharedFooter(meta, len(spans))
            for span in spans:
                sub = Source([loc], self.format, self._reader, self._hint)
                sub._schema = schema
                sub._part_types = dict(self._part_types)
                sub._span = span
                sub._footer = footer
                sub.decode_threads = self.decode_threads
                sub.is_part = True
                if i in self._file_columns:
                    sub._file_columns = {0: self._file_columns[i]}
                if i in self._checked:
                    sub._checked = {0}
                out.append((sub, i))
        return out

    @property
    def first_row(self) -> int:
        """Row of its file where this source starts (a part of a Parquet file; else 0)."""
        return self._span[2] if self._span is not None else 0

    def row_count(self) -> int:
        """Rows of a Parquet source (or part), from the footers; other formats must be read to tell."""
        if self.format != "parquet":
            raise DataSourceError(f"the row count of {self.format} files is only known by reading them")
        total = 0
        for loc in self._locs:
            meta = self._footer.meta if (self._footer is not None and self._footer.meta is not None) \
                else self._reader.footer(loc)
            first, stop = self._span[:2] if self._span is not None else (0, meta.num_row_groups)
            total += sum(meta.row_group(g).num_rows for g in range(first, stop))
        return total

    def _use_engine(self, engine: str) -> None:
        """Switch the text parser ("polars", "pyarrow", "pyarrow-stream"); for benchmarks and tests."""
        if not hasattr(self._reader, "engine"):
            raise DataSourceError(f"{self.format} files have a single reader; no engine to choose")
        type(self._reader)(engine=engine)  # validates the name
        self._reader.engine = engine

    # ---- identity
    def fingerprint(self) -> dict:
        """Paths, sizes and modification times as they are now, for caching and provenance."""
        files, total = [], 0
        for loc in self._locs:
            try:
                st = loc.fs.get_file_info(loc.fs_path)
            except (OSError, pa.ArrowException) as exc:
                raise DataSourceError(f"{loc.path}: cannot read file status ({exc})") from None
            if st.type != pafs.FileType.File:
                raise DataSourceError(f"{loc.path}: no such file any more (was it moved or deleted?)")
            mtime = st.mtime_ns / 1e9 if st.mtime_ns is not None else None
            files.append({"path": loc.path, "size": st.size, "mtime": mtime})
            total += st.size
        return {"files": files, "total_bytes": total, "format": self.format}

    def describe(self) -> str:
        """One short line such as '3 Parquet files, 1.2 GB'."""
        n = len(self.files)
        text = f"{n} {FORMAT_LABELS.get(self.format, self.format)} file{'s' if n != 1 else ''}, " \
               f"{human_bytes(sum(f.size for f in self.files))}"
        keys = list(self.files[0].partition) if self.files else []
        return text + (f", partitioned by {', '.join(keys)}" if keys else "")

    def __repr__(self) -> str:
        return f"<Source {self.describe()}>"
