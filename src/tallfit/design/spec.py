"""The model specification: which column is the target, which are the terms."""

from __future__ import annotations

from dataclasses import dataclass

import pyarrow as pa

from tallfit.errors import ColumnNotFoundError, DesignError, SchemaError

INTERCEPT = "(intercept)"


@dataclass(frozen=True)
class ModelSpec:
    """Target column, numeric feature columns, and whether an intercept column leads the design."""

    target: str
    features: tuple[str, ...]
    intercept: bool = True

    def __post_init__(self) -> None:
        if not self.target:
            raise DesignError("no target column given: name the column to explain with --target")
        seen: set[str] = set()
        for name in self.features:
            if name in seen:
                raise DesignError(f"feature {name!r} is listed twice; list each feature once")
            seen.add(name)
        if self.target in seen:
            raise DesignError(
                f"the target {self.target!r} is also listed as a feature; remove it from the features"
            )
        if not self.features and not self.intercept:
            raise DesignError("the model has no terms: give features or keep the intercept")

    @property
    def term_names(self) -> list[str]:
        """Names of the design columns, in order (the intercept first when present)."""
        return ([INTERCEPT] if self.intercept else []) + list(self.features)

    @property
    def input_columns(self) -> list[str]:
        """Columns to read from the data: features then target."""
        return list(self.features) + [self.target]

    def to_dict(self) -> dict:
        return {"target": self.target, "features": list(self.features), "intercept": self.intercept}

    @classmethod
    def from_dict(cls, d: dict) -> "ModelSpec":
        return cls(target=d["target"], features=tuple(d["features"]), intercept=bool(d["intercept"]))


def _is_numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t) or (
        pa.types.is_decimal(t)
    )


def check_columns(schema: pa.Schema, columns: list[str], target: str | None, where: str) -> None:
    """Raise a specific error if a column is missing or not numeric."""
    names = schema.names
    for col in columns:
        if col not in names:
            raise ColumnNotFoundError(col, names, where=where)
        t = schema.field(col).type
        if pa.types.is_dictionary(t):
            t = t.value_type
        if _is_numeric(t):
            continue
        if col == target:
            raise SchemaError(
                f"target column {col!r} in {where} has type {t}, not a number; "
                "the target must be numeric (int, float or bool)"
            )
        raise SchemaError(
            f"feature column {col!r} in {where} has type {t}, not a number; numeric features must "
            "be int, float or bool. If it holds labels (a class, a region), it needs to enter the "
            "model as a categorical term instead of a numeric feature"
        )
