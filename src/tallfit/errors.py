"""One root error and a few domain errors, each with a message a user can act on.

Every error raised on purpose by tallfit derives from :class:`TallfitError`; the command line
prints its message on one line and exits non-zero, so messages must say *what* was wrong,
*where* (file, column, row range) and *what to do*.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class TallfitError(Exception):
    """Root of every error tallfit raises on purpose."""

    exit_code = 2


class DataSourceError(TallfitError):
    """A path, glob or file cannot be read: missing, empty, corrupt, truncated or conflicting.

    Example: ``DataSourceError("data/day3.parquet: not a readable Parquet file (...)")``.
    """


class SchemaError(TallfitError):
    """Files of one data set disagree on a column, or a column has an unusable type."""


class ColumnNotFoundError(TallfitError):
    """A named column is not in the data; the message suggests the nearest names."""

    def __init__(self, column: str, available: Iterable[str], where: str = "") -> None:
        available = list(available)
        near = difflib.get_close_matches(column, available, n=3, cutoff=0.5)
        hint = f"; did you mean {', '.join(repr(c) for c in near)}?" if near else ""
        place = f" in {where}" if where else ""
        shown = ", ".join(available[:12]) + (", ..." if len(available) > 12 else "")
        super().__init__(f"column {column!r} not found{place}{hint} (columns: {shown})")
        self.column = column


class DesignError(TallfitError):
    """The model cannot be fitted as specified: too few rows, aliased terms, no rows left."""


class AliasedTermsError(DesignError):
    """Some terms are exact linear combinations of others (constant, duplicated, collinear)."""

    def __init__(self, message: str, aliased: list[str]) -> None:
        super().__init__(message)
        self.aliased = aliased


class ModelFileError(TallfitError):
    """A model file is unreadable, of another format, or of a newer version."""


class OutputError(TallfitError):
    """An output path cannot be written (missing or read-only directory, existing file)."""


class NumericalError(TallfitError):
    """A computation produced non-finite values or diverged."""
