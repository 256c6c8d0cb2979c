"""Column types across files: unification rules, columns_hint types, hive partition columns, casts."""

from __future__ import annotations

import re
from typing import Any

import pyarrow as pa

from tallfit.errors import DataSourceError, SchemaError

_STRINGS = (pa.types.is_string, pa.types.is_large_string, pa.types.is_string_view)


def _is_stringlike(t: pa.DataType) -> bool:
    return any(f(t) for f in _STRINGS)


def _is_number(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)


def unify_types(a: pa.DataType, b: pa.DataType) -> pa.DataType | None:
    """The common type of two column types, or None when they conflict (numeric widening allowed)."""
    if a.equals(b):
        return a
    if pa.types.is_null(a):
        return b
    if pa.types.is_null(b):
        return a
    if pa.types.is_dictionary(a):
        return unify_types(a.value_type, b)
    if pa.types.is_dictionary(b):
        return unify_types(a, b.value_type)
    if _is_stringlike(a) and _is_stringlike(b):
        return pa.large_string() if pa.types.is_large_string(a) or pa.types.is_large_string(b) else pa.string()
    if pa.types.is_integer(a) and pa.types.is_integer(b):
        return pa.int64()
    if _is_number(a) and _is_number(b):
        return pa.float64()
    if pa.types.is_timestamp(a) and pa.types.is_timestamp(b) and a.tz == b.tz:
        units = ["s", "ms", "us", "ns"]
        return pa.timestamp(max(a.unit, b.unit, key=units.index), a.tz)
    return None


_HINT_TYPES = {
    "float64": pa.float64(), "float": pa.float64(), "double": pa.float64(), "number": pa.float64(),
    "int64": pa.int64(), "int": pa.int64(), "integer": pa.int64(),
    "string": pa.string(), "str": pa.string(), "text": pa.string(), "category": pa.string(),
    "categorical": pa.string(), "bool": pa.bool_(), "boolean": pa.bool_(),
}


def hint_type(column: str, spec: Any) -> pa.DataType:
    """Turn a columns_hint value ("float64", "string", a pyarrow type...) into a pyarrow type."""
    if isinstance(spec, pa.DataType):
        return spec
    t = _HINT_TYPES.get(str(spec).strip().lower())
    if t is None:
        raise SchemaError(f"columns_hint: unknown type {spec!r} for column {column!r}; "
                          f"use one of float64, int64, string, bool (or a pyarrow type)")
    return t


_INT_RE = re.compile(r"-?(0|[1-9][0-9]{0,17})")
HIVE_NULL = "__HIVE_DEFAULT_PARTITION__"


def part_value(raw: str) -> str | None:
    return None if raw == HIVE_NULL else raw


def partition_type(values: list[str | None]) -> pa.DataType:
    """int64 if every partition value is plainly an integer (no leading zeros), else string."""
    present = [v for v in values if v is not None]
    if present and all(_INT_RE.fullmatch(v) for v in present):
        return pa.int64()
    return pa.string()


def partition_array(value: str | None, typ: pa.DataType, n: int) -> pa.Array:
    """A constant column of `n` rows holding one partition value."""
    if value is None:
        return pa.nulls(n, typ)
    try:
        scalar = pa.scalar(value, pa.string()).cast(typ)
    except (pa.ArrowException, ValueError):
        raise DataSourceError(f"hive partition value {value!r} cannot be read as {typ}") from None
    return pa.repeat(scalar, n)


def cast_column(arr: pa.Array, typ: pa.DataType, column: str, where: str) -> pa.Array:
    """Cast one column to its unified type, turning failures into a DataSourceError."""
    if arr.type.equals(typ):
        return arr
    try:
        return arr.cast(typ)
    except (pa.ArrowException, ValueError) as exc:
        raise DataSourceError(f"{where}: column {column!r} cannot be converted from {arr.type} to {typ} "
                              f"({exc}); give its type with columns_hint") from None
