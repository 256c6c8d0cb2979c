"""Build a validated ModelSpec from the user's options (shared by the API and the CLI)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from tallfit.design.spec import MissingPolicy, ModelSpec
from tallfit.design.sql import pairwise_interactions, parse_derive, polynomial, sql_inputs
from tallfit.errors import DesignError


def column_names(value: str | Sequence[str] | None) -> tuple[str, ...]:
    """Column names from a list, or from one comma-separated string ("zone,pod"): a bare string
    is never read as a sequence of one-letter names."""
    if value is None:
        return ()
    if isinstance(value, str):
        return tuple(v.strip() for v in value.split(",") if v.strip())
    return tuple(value)


def make_spec(
    target: str,
    features: Sequence[str],
    *,
    intercept: bool = True,
    categorical: Sequence[str] = (),
    derive: Sequence[str | tuple[str, str]] = (),
    interactions: Sequence[str] = (),
    polynomials: Mapping[str, int] | None = None,
    where: str | None = None,
    weights: str | None = None,
    weight_kind: str = "analytic",
    missing: Mapping[str, str | MissingPolicy] | None = None,
    absorb: str | None = None,
    by: Sequence[str] = (),
) -> ModelSpec:
    """The spec of a fit. Derived terms (``derive``, ``interactions``, ``polynomials``) are added
    to the features after the listed ones, unless already listed by name. Lists of columns may
    also be given as one comma-separated string; ``derive`` as one expression."""
    features, categorical = column_names(features), column_names(categorical)
    interactions, by = column_names(interactions), column_names(by)
    derive = [derive] if isinstance(derive, str) else derive
    pairs: list[tuple[str, str]] = []
    for d in derive:
        pairs.append(parse_derive(d) if isinstance(d, str) else (str(d[0]), str(d[1]).strip()))
    pairs += pairwise_interactions(list(interactions)) if len(interactions) >= 2 else []
    if interactions and len(interactions) < 2:
        raise DesignError("pairwise interactions need at least two columns")
    for col, degree in (polynomials or {}).items():
        pairs += polynomial(col, int(degree))
    feats = list(features) + [n for n, _ in pairs if n not in features]
    policies = []
    for col, p in (missing or {}).items():
        policies.append((col, p if isinstance(p, MissingPolicy) else MissingPolicy.parse(p)))
    inputs = sql_inputs(tuple(pairs), where) if (pairs or where) else ()
    if absorb and absorb in categorical:
        raise DesignError(f"{absorb!r} cannot be both absorbed and categorical")
    return ModelSpec(
        target=target,
        features=tuple(feats),
        intercept=intercept,
        categorical=tuple(categorical),
        derive=tuple(pairs),
        where=where or None,
        weights=weights,
        weight_kind=weight_kind,
        missing=tuple(policies),
        absorb=absorb,
        by=tuple(by),
        derived_inputs=tuple(inputs),
    )
