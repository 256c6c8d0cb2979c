"""A source over record batches handed over by Python code (list, generator, or a callable making them)."""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterable, Iterator
from typing import Any

import pyarrow as pa

from tallfit.errors import ColumnNotFoundError, DataSourceError, SchemaError

from .base import Chunk, FileInfo, check_batch_rows, slices
from .columns import cast_column, unify_types


def _as_batches(item: Any, k: int, name: str) -> list[pa.RecordBatch]:
    """One yielded item (RecordBatch, Table or any Arrow-exporting object) as record batches."""
    if isinstance(item, pa.RecordBatch):
        return [item]
    if isinstance(item, pa.Table):
        return item.to_batches()
    if hasattr(item, "__arrow_c_stream__") or hasattr(item, "__arrow_c_array__"):
        try:
            return pa.table(item).to_batches()
        except (pa.ArrowException, TypeError, ValueError) as exc:
            raise DataSourceError(f"item {k} of {name} cannot be converted to Arrow ({exc})") from None
    raise DataSourceError(f"item {k} of {name} is a {type(item).__name__}; expected pyarrow.RecordBatch "
                          f"or pyarrow.Table")


class _Rebatcher:
    """Regroups batches of any size into batches of exactly batch_rows rows (the last may be shorter);
    large batches are sliced without copying, small ones are merged."""

    def __init__(self, batch_rows: int) -> None:
        self.batch_rows = batch_rows
        self._held: list[pa.RecordBatch] = []
        self._n = 0

    def _merge(self) -> pa.RecordBatch:
        held, self._held, self._n = self._held, [], 0
        if len(held) == 1:
            return held[0]
        if held[0].num_columns == 0:
            return _empty_rows(held)
        return pa.Table.from_batches(held).combine_chunks().to_batches()[0]

    def push(self, batch: pa.RecordBatch) -> Iterator[pa.RecordBatch]:
        if batch.num_rows == 0:
            return
        self._held.append(batch)
        self._n += batch.num_rows
        if self._n < self.batch_rows:
            return
        merged = self._merge()
        full = (merged.num_rows // self.batch_rows) * self.batch_rows
        yield from slices(merged.slice(0, full), self.batch_rows)
        if full < merged.num_rows:
            self._held, self._n = [merged.slice(full)], merged.num_rows - full

    def flush(self) -> Iterator[pa.RecordBatch]:
        if self._n:
            yield self._merge()


def _empty_rows(held: list[pa.RecordBatch]) -> pa.RecordBatch:
    """A zero-column batch with the rows of `held` (column-less batches cannot be concatenated)."""
    n = sum(b.num_rows for b in held)
    return pa.RecordBatch.from_arrays([pa.nulls(n)], names=["_"]).select([])


class IterableSource:
    """Wraps an iterable of pyarrow RecordBatches/Tables, or a zero-argument callable returning one.

    A list (or other re-iterable) or a callable can be streamed any number of times; a one-shot iterator
    or generator only once.
    """

    files: list[FileInfo]
    format = "arrow"

    def __init__(self, batches: Iterable | Callable[[], Iterable] | pa.Table | pa.RecordBatch,
                 name: str = "<batches>") -> None:
        if isinstance(batches, (pa.Table, pa.RecordBatch)):
            batches = [batches]
        self.name = name
        self.files = []
        self._factory: Callable[[], Iterable] | None = None
        self._iterable: Iterable | None = None
        self._pending: Iterator | None = None    # one-shot iterator with its first batch pushed back
        self._used = False
        if callable(batches) and not hasattr(batches, "__iter__"):
            self._factory = batches
        elif hasattr(batches, "__iter__"):
            if iter(batches) is batches:         # iterator / generator: a single pass only
                self._pending = batches
            else:
                self._iterable = batches
        else:
            raise DataSourceError(f"{name}: expected an iterable of pyarrow.RecordBatch/Table or a callable "
                                  f"returning one, got {type(batches).__name__}")
        self._schema: pa.Schema | None = None

    # ---- raw iteration
    def _fresh(self) -> Iterator[pa.RecordBatch]:
        if self._factory is not None:
            made = self._factory()
            if isinstance(made, (pa.Table, pa.RecordBatch)):
                made = [made]
            try:
                return iter(made)
            except TypeError:
                raise DataSourceError(f"{self.name}: the callable returned {type(made).__name__}, "
                                      f"not an iterable of record batches") from None
        if self._iterable is not None:
            return iter(self._iterable)
        if self._used:
            raise DataSourceError(
                f"{self.name} is a one-shot iterator and has already been streamed; a fit needing more than "
                f"one pass requires a re-iterable: pass a list of batches, or a zero-argument callable that "
                f"returns a fresh iterator on each call")
        self._used = True
        return self._pending

    def _items(self, it: Iterator) -> Iterator[pa.RecordBatch]:
        for k, item in enumerate(it):
            yield from _as_batches(item, k, self.name)

    @property
    def schema(self) -> pa.Schema:
        """Schema of the first batch (peeked; a one-shot iterator gets the batch chained back)."""
        if self._schema is None:
            if self._pending is not None and not self._used:
                items = self._items(self._pending)
                first = next(items, None)
                self._pending = items if first is None else itertools.chain([first], items)
            else:
                it = self._fresh() if self._pending is None else iter(())
                first = next(self._items(it), None)
                close = getattr(it, "close", None)
                if close is not None:
                    close()
            if first is None:
                raise DataSourceError(f"{self.name} yielded no record batches; cannot determine the columns")
            self._schema = first.schema.remove_metadata()
        return self._schema

    # ---- streaming
    def batches(self, columns: list[str], batch_rows: int = 65536, prune=None) -> Iterator[Chunk]:
        """Stream the batches re-sliced to at most batch_rows rows, holding only `columns`."""
        batch_rows = check_batch_rows(batch_rows)
        columns = list(columns)
        schema = self.schema
        for c in columns:
            if c not in schema.names:
                raise ColumnNotFoundError(c, schema.names, where=self.name)
        if self._factory is None and self._iterable is None and self._used:
            self._fresh()  # raises the one-shot error now rather than at the first next()
        return self._stream(columns, batch_rows, schema)

    def _stream(self, columns: list[str], batch_rows: int, schema: pa.Schema) -> Iterator[Chunk]:
        out_schema = pa.schema([schema.field(c) for c in columns])
        rebatch = _Rebatcher(batch_rows)
        row = 0
        for k, rb in enumerate(self._items(self._fresh())):
            for c in columns:
                if c not in rb.schema.names:
                    raise ColumnNotFoundError(c, rb.schema.names, where=f"batch {k} of {self.name}")
            where = f"batch {k} of {self.name}"
            arrays = []
            for c, f in zip(columns, out_schema):
                arr = rb.column(c)
                if unify_types(f.type, arr.type) is None:
                    raise SchemaError(f"column {c!r} is {f.type} in the first batch of {self.name} but "
                                      f"{arr.type} in {where}; make the batches agree")
                arrays.append(cast_column(arr, f.type, c, where))
            piece = pa.RecordBatch.from_arrays(arrays, schema=out_schema) if columns else rb.select([])
            for part in rebatch.push(piece):
                yield Chunk(part, -1, row)
                row += part.num_rows
        for part in rebatch.flush():
            yield Chunk(part, -1, row)
            row += part.num_rows

    # ---- identity
    def fingerprint(self) -> dict:
        """No files to stat: the name and the schema stand in for the data's identity."""
        return {"files": [], "total_bytes": 0, "format": self.format, "name": self.name,
                "schema": [f"{f.name}:{f.type}" for f in self.schema]}

    def describe(self) -> str:
        """One short line."""
        return f"Arrow record batches from {self.name}"

    def __repr__(self) -> str:
        return f"<IterableSource {self.name}>"
