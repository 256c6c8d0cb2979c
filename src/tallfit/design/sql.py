"""Derived columns and row filters as SQL expressions, evaluated per batch with polars.

``--derive "log_iops = ln(disk_iops + 1)"`` and ``--where "region = 'north-1' AND cpu_util > 0.05"``
are compiled once (polars' SQL expression parser) and applied to every batch before the design
is built. Expressions are checked against the data's columns before any row is read.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pyarrow as pa

from tallfit.errors import ColumnNotFoundError, DesignError

_NAME = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*=(?!=)\s*(.+)$", re.S)


def parse_derive(text: str) -> tuple[str, str]:
    """'NAME = EXPR' → (NAME, EXPR), with a message that shows the expected form."""
    m = _NAME.match(text)
    if not m:
        raise DesignError(
            f"--derive {text!r}: expected NAME = EXPRESSION, e.g. \"log_iops = ln(disk_iops + 1)\""
        )
    return m.group(1), m.group(2).strip()


def _compile(expr: str, what: str):
    import polars as pl

    try:
        compiled = pl.sql_expr(expr)
        roots = compiled.meta.root_names()
    except Exception as exc:  # polars raises several SQL error types
        raise DesignError(f"{what} {expr!r} is not a valid SQL expression: {_first_line(exc)}") from None
    return compiled, list(dict.fromkeys(roots))


def _first_line(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


@dataclass
class CompiledFrame:
    """The SQL step of a design: a filter, then derived columns in order."""

    where: object | None
    derive: list[tuple[str, object]]
    inputs: list[str]
    where_text: str | None
    derive_text: list[tuple[str, str]]

    def check(self, schema: pa.Schema, where_label: str) -> None:
        """Every column an expression names must exist (earlier derived names count)."""
        available = list(schema.names)
        if self.where is not None:
            for col in _roots(self.where):
                if col not in available:
                    raise ColumnNotFoundError(col, available, where=f"--where {self.where_text!r} ({where_label})")
        for (name, expr), (_, text) in zip(self.derive, self.derive_text):
            for col in _roots(expr):
                if col not in available:
                    raise ColumnNotFoundError(col, available, where=f"--derive {name} = {text!r} ({where_label})")
            available.append(name)

    def apply(self, batch: pa.RecordBatch, label: str) -> tuple[pa.RecordBatch, np.ndarray | None]:
        """The batch filtered and with the derived columns, and the positions in ``batch`` of the
        rows the filter kept (None without a filter), so rows can still be named by place."""
        import polars as pl

        df = pl.from_arrow(batch)
        rows = None
        try:
            if self.where is not None:
                mask = df.select(self.where.fill_null(False)).to_series()
                rows = np.flatnonzero(mask.to_numpy())
                df = df.filter(mask)
            for name, expr in self.derive:
                df = df.with_columns(expr.alias(name))
        except Exception as exc:
            raise DesignError(f"evaluating the SQL expressions on {label} failed: {_first_line(exc)}") from None
        table = df.to_arrow()
        if table.num_rows == 0:
            return pa.RecordBatch.from_pylist([], schema=table.schema), rows
        return table.combine_chunks().to_batches()[0], rows


def _roots(expr) -> list[str]:
    return expr.meta.root_names()


def compile_frame(derive: tuple[tuple[str, str], ...], where: str | None) -> CompiledFrame:
    compiled_where, inputs = (None, [])
    if where:
        compiled_where, inputs = _compile(where, "--where")
    compiled = []
    derived_so_far: set[str] = set()
    for name, expr in derive:
        c, roots = _compile(expr, f"--derive {name} =")
        compiled.append((name, c))
        inputs += [r for r in roots if r not in derived_so_far]
        derived_so_far.add(name)
    return CompiledFrame(compiled_where, compiled, list(dict.fromkeys(inputs)), where, list(derive))


def sql_inputs(derive: tuple[tuple[str, str], ...], where: str | None) -> tuple[str, ...]:
    """Input columns the expressions read (derived names excluded)."""
    return tuple(compile_frame(derive, where).inputs)


def pairwise_interactions(columns: list[str]) -> list[tuple[str, str]]:
    """Derived products of every pair: ("a_x_b", "a * b")."""
    return [(f"{a}_x_{b}", f"{a} * {b}") for a, b in combinations(columns, 2)]


def polynomial(column: str, degree: int) -> list[tuple[str, str]]:
    """Derived powers 2..degree of a column: ("c_pow2", "power(c, 2)"), ..."""
    if degree < 2:
        raise DesignError(f"polynomial degree for {column!r} must be at least 2 (got {degree})")
    return [(f"{column}_pow{d}", f"power({column}, {d})") for d in range(2, degree + 1)]
