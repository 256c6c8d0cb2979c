"""Turn what a user passes as data (paths, a table, batches, a Source) into a Source."""

from __future__ import annotations

import os
from typing import Any

import pyarrow as pa


def as_source(data: Any, *, format: str | None = None, delimiter: str = ","):
    """A Source for a path, glob, directory or list of them; a pyarrow Table or RecordBatch; an
    iterable of record batches or a zero-argument callable returning one; or a Source itself."""
    if hasattr(data, "batches") and hasattr(data, "schema") and hasattr(data, "describe"):
        return data
    from tallfit.sources import IterableSource, open_source

    if isinstance(data, (str, os.PathLike)):
        return open_source(data, format=format, delimiter=delimiter)
    if isinstance(data, (list, tuple)) and data and all(isinstance(d, (str, os.PathLike)) for d in data):
        return open_source(list(data), format=format, delimiter=delimiter)
    if isinstance(data, (list, tuple)) and not data:
        from tallfit.errors import DataSourceError

        raise DataSourceError("no data given: the list of files is empty (did a glob match nothing?)")
    if isinstance(data, pa.Table):
        table = data
        return IterableSource(lambda: table.to_batches(), name="<table>")
    if isinstance(data, pa.RecordBatch):
        batch = data
        return IterableSource(lambda: [batch], name="<record batch>")
    return IterableSource(data)


def source_label(source) -> str:
    """How errors name a data set: the file itself when there is one, else the description."""
    files = getattr(source, "files", None) or []
    if len(files) == 1:
        return str(files[0].path)
    return source.describe()
