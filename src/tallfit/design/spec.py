"""The model specification: the target, the terms, and how rows become design columns.

A spec is a frozen value (hashable, JSON round-trippable). Terms, in design order:
the intercept; the numeric features (input columns or names defined by ``derive``); one
missing-value indicator per feature asked for; then the indicator columns of each
categorical column (their levels are discovered while streaming).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pyarrow as pa

from tallfit.errors import ColumnNotFoundError, DesignError, SchemaError

INTERCEPT = "(intercept)"
MISSING_POLICIES = ("drop", "fail", "fill")
WEIGHT_KINDS = ("analytic", "frequency")


@dataclass(frozen=True)
class MissingPolicy:
    """What to do with a missing or non-finite value in one column."""

    action: str = "drop"  # drop the row | fail on first occurrence | fill with `value`
    value: float = 0.0
    indicator: bool = False  # add a 0/1 column "<col>[missing]" (implies fill)

    def __post_init__(self) -> None:
        if self.action not in MISSING_POLICIES:
            raise DesignError(f"unknown missing-value policy {self.action!r}; use one of {', '.join(MISSING_POLICIES)}")

    @classmethod
    def parse(cls, text: str) -> "MissingPolicy":
        """'drop', 'fail', 'fill:0.5', 'indicator' or 'indicator:0.5' (fill value for the indicator)."""
        head, _, arg = text.strip().partition(":")
        head = head.strip().lower()
        try:
            value = float(arg) if arg.strip() else 0.0
        except ValueError:
            raise DesignError(f"missing-value policy {text!r}: {arg!r} is not a number") from None
        if head == "indicator":
            return cls("fill", value, True)
        if head == "fill" and not arg.strip():
            raise DesignError(f"missing-value policy {text!r}: give the fill value, e.g. fill:0")
        return cls(head, value, False)

    def to_text(self) -> str:
        if self.indicator:
            return f"indicator:{self.value!r}"
        return f"fill:{self.value!r}" if self.action == "fill" else self.action


def indicator_name(column: str, level: str) -> str:
    return f"{column}[{level}]"


def missing_indicator_name(column: str) -> str:
    return f"{column}[missing]"


@dataclass(frozen=True)
class ModelSpec:
    """Target column, terms, and the row-level recipe (filter, derived columns, weights, policies)."""

    target: str
    features: tuple[str, ...]
    intercept: bool = True
    categorical: tuple[str, ...] = ()
    derive: tuple[tuple[str, str], ...] = ()  # (name, SQL expression over input columns)
    where: str | None = None  # SQL condition: rows kept
    weights: str | None = None
    weight_kind: str = "analytic"
    missing: tuple[tuple[str, MissingPolicy], ...] = ()  # per-column policies; "*" for all
    absorb: str | None = None
    by: tuple[str, ...] = ()
    derived_inputs: tuple[str, ...] = field(default=(), compare=False)

    def __post_init__(self) -> None:
        if not self.target:
            raise DesignError("no target column given: name the column to explain with --target")
        seen: set[str] = set()
        for name in self.features + self.categorical:
            if name in seen:
                raise DesignError(f"term {name!r} is listed twice; list each feature or categorical column once")
            seen.add(name)
        if self.target in seen:
            raise DesignError(f"the target {self.target!r} is also listed as a term; remove it from the terms")
        if not self.features and not self.categorical and not self.intercept and not self.absorb:
            raise DesignError("the model has no terms: give features or keep the intercept")
        if self.weight_kind not in WEIGHT_KINDS:
            raise DesignError(f"weight kind must be one of {', '.join(WEIGHT_KINDS)}, not {self.weight_kind!r}")
        names = [n for n, _ in self.derive]
        if len(set(names)) != len(names):
            raise DesignError("a derived column name is defined twice; give each --derive a distinct name")

    # -- design columns -----------------------------------------------------------------
    @property
    def has_intercept_column(self) -> bool:
        """An absorbed key takes the place of the intercept (it is swept out with the group means)."""
        return self.intercept and not self.absorb

    @property
    def indicator_features(self) -> tuple[str, ...]:
        return tuple(f for f in self.features if self.policy_for(f).indicator)

    @property
    def term_names(self) -> list[str]:
        """Design columns known before reading data (categorical indicators are added while streaming)."""
        return (
            ([INTERCEPT] if self.has_intercept_column else [])
            + list(self.features)
            + [missing_indicator_name(f) for f in self.indicator_features]
        )

    @property
    def derived_names(self) -> tuple[str, ...]:
        return tuple(n for n, _ in self.derive)

    @property
    def needs_frame(self) -> bool:
        """Whether batches go through the SQL step (filter or derived columns)."""
        return bool(self.derive or self.where)

    @property
    def input_columns(self) -> list[str]:
        """Columns read from the data, each once: raw features, SQL inputs, categoricals, target..."""
        derived = set(self.derived_names)
        cols = [f for f in self.features if f not in derived]
        cols += list(self.derived_inputs)
        cols += list(self.categorical)
        cols += [c for c in (self.weights, self.absorb) if c]
        cols += list(self.by)
        cols.append(self.target)
        return [c for c in dict.fromkeys(cols) if c not in derived]

    @property
    def numeric_columns(self) -> list[str]:
        """Columns that must be numeric after the SQL step: features and target."""
        return list(self.features) + [self.target]

    def policy_for(self, column: str) -> MissingPolicy:
        default = MissingPolicy()
        for name, policy in self.missing:
            if name == column:
                return policy
            if name == "*":
                default = policy
        if column == self.target and default.action == "fill":
            return MissingPolicy()  # a target is never invented
        return default

    # -- (de)serialisation -----------------------------------------------------------------
    def to_dict(self) -> dict:
        return {
            "target": self.target,
            "features": list(self.features),
            "intercept": self.intercept,
            "categorical": list(self.categorical),
            "derive": [[n, e] for n, e in self.derive],
            "where": self.where,
            "weights": self.weights,
            "weight_kind": self.weight_kind,
            "missing": [[c, p.to_text()] for c, p in self.missing],
            "absorb": self.absorb,
            "by": list(self.by),
            "derived_inputs": list(self.derived_inputs),
        }

    @classmethod
    def from_dict(cls, d: dict) -> "ModelSpec":
        return cls(
            target=d["target"],
            features=tuple(d["features"]),
            intercept=bool(d["intercept"]),
            categorical=tuple(d.get("categorical", ())),
            derive=tuple((str(n), str(e)) for n, e in d.get("derive", ())),
            where=d.get("where"),
            weights=d.get("weights"),
            weight_kind=d.get("weight_kind", "analytic"),
            missing=tuple((str(c), MissingPolicy.parse(p)) for c, p in d.get("missing", ())),
            absorb=d.get("absorb"),
            by=tuple(d.get("by", ())),
            derived_inputs=tuple(d.get("derived_inputs", ())),
        )


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
            f"be int, float or bool. If it holds labels (a class, a region), declare it categorical "
            f"instead (--categorical {col})"
        )


def check_present(schema: pa.Schema, columns: list[str], where: str) -> None:
    """Raise if a column is missing (any type allowed)."""
    for col in columns:
        if col not in schema.names:
            raise ColumnNotFoundError(col, schema.names, where=where)
