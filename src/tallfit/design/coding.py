"""The final coding of categorical columns, chosen after the pass and applied to the factor.

During the pass every level has its own indicator column. Afterwards, without reading the data
again: rare levels (fewer than ``min_count`` rows, or beyond the ``max_levels`` most frequent)
merge into one "other" level, a reference level is chosen (default: the most frequent; its
column is dropped, so the other indicators measure differences from it), and the remaining
columns are put in a stable order. All of this is one linear map T of the factor's columns,
applied as triu(qr(R·T)), which equals a direct fit with that coding to rounding.
"""

from __future__ import annotations

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.spec import ModelSpec, indicator_name
from tallfit.errors import DesignError

OTHER = "(other)"


def _named_groups(col: str, seen: dict[str, int], merges: dict[str, list[str]] | None) -> dict[str, str]:
    """Level → the level it is merged into by the user's ``{new: [old, ...]}`` (itself if none)."""
    alias = {lvl: lvl for lvl in seen}
    for new, olds in (merges or {}).items():
        for old in olds:
            if old not in seen:
                raise DesignError(
                    f"cannot merge level {old!r} of {col!r}: it has no used rows "
                    f"(levels: {', '.join(sorted(seen)[:10])})"
                )
            alias[old] = new
    return alias


def _plan_column(col: str, counts: dict[str, int], reference: str | None, min_count: int | None,
                 max_levels: int | None, needs_reference: bool,
                 merges: dict[str, list[str]] | None = None, drops: list[str] | None = None) -> dict:
    raw = {lvl: n for lvl, n in counts.items() if n > 0}
    if not raw:
        raise DesignError(f"categorical column {col!r} has no level with usable rows")
    alias = _named_groups(col, raw, merges)
    seen: dict[str, int] = {}
    for lvl, n in raw.items():
        seen[alias[lvl]] = seen.get(alias[lvl], 0) + n
    dropped = sorted(set(drops or ()))
    for lvl in dropped:
        if lvl not in seen:
            raise DesignError(
                f"cannot drop level {lvl!r} of {col!r}: it is not among its levels "
                f"({', '.join(sorted(seen)[:10])})"
            )
        if lvl == reference:
            raise DesignError(f"level {lvl!r} of {col!r} is both the reference and dropped; choose one")
    reported = dict(seen)
    dropped_rows = sum(seen.pop(lvl) for lvl in dropped)
    if dropped and not seen:
        raise DesignError(f"dropping {', '.join(dropped)} leaves no level of {col!r}")
    ranked = sorted(seen, key=lambda lvl: (-seen[lvl], lvl))
    merged = set()
    if min_count:
        merged |= {lvl for lvl in ranked if seen[lvl] < min_count}
    if max_levels is not None and len(ranked) > max_levels:
        merged |= set(ranked[max_levels:])
    kept = [lvl for lvl in ranked if lvl not in merged]
    groups = {lvl: seen[lvl] for lvl in kept}
    if merged:
        groups[OTHER] = sum(seen[lvl] for lvl in merged)
    if len(groups) < 2 and needs_reference:
        only = next(iter(groups))
        raise DesignError(
            f"categorical column {col!r} has only one level ({only!r}) in the used rows: it is "
            "constant, so it cannot be estimated beside the intercept; drop it from the model"
        )
    if reference is not None:
        if reference in merged:
            raise DesignError(f"reference level {reference!r} of {col!r} was merged into {OTHER}; choose another")
        if reference not in groups:
            raise DesignError(
                f"reference level {reference!r} of {col!r} is not among its levels "
                f"({', '.join(sorted(groups)[:10])})"
            )
    elif needs_reference:
        reference = max(groups, key=lambda g: (groups[g], g != OTHER, g))  # most frequent
    if not needs_reference:
        reference = None
    if dropped and reference is not None:
        groups[reference] += dropped_rows  # a dropped level's rows join the reference level
    columns = sorted(g for g in groups if g != reference and g != OTHER)
    if OTHER in groups and reference != OTHER:
        columns.append(OTHER)
    offset = {g: i for i, g in enumerate(columns)}
    column_of = {}
    for lvl in raw:
        group = OTHER if alias[lvl] in merged else alias[lvl]
        column_of[lvl] = -1 if group in dropped else offset.get(group, -1)
    return {
        "columns": columns,
        "column_of": column_of,
        "reference": reference,
        "merged": sorted(merged),
        "merged_by_name": {new: sorted(olds) for new, olds in (merges or {}).items()},
        "dropped": dropped,
        "other_column": offset.get(OTHER),
        "counts": dict(sorted(reported.items(), key=lambda kv: (-kv[1], kv[0]))),
    }


def finalize_coding(
    acc: FactorAccumulator,
    spec: ModelSpec,
    reference: dict[str, str] | None = None,
    min_count: int | None = None,
    max_levels: int | None = None,
    merges: dict[str, dict[str, list[str]]] | None = None,
    drops: dict[str, list[str]] | None = None,
) -> tuple[FactorAccumulator, dict | None, np.ndarray | None]:
    """Recode the factor to the final categorical coding: (new accumulator, coding, map T).

    ``drops``: levels whose indicator column is dropped, so their rows count as the reference
    level (without a reference level: as no level)."""
    if not spec.categorical:
        if drops:
            raise DesignError(f"levels to drop given for {sorted(drops)}, which are not categorical columns")
        return acc, None, None
    reference = reference or {}
    unknown = (set(reference) | set(merges or {}) | set(drops or {})) - set(spec.categorical)
    if unknown:
        raise DesignError(f"levels given for {sorted(unknown)}, which are not categorical columns")
    raw_index = {n: i for i, n in enumerate(acc.names)}
    base = spec.term_names
    names = list(base)
    sources: list[list[int]] = [[raw_index[n]] for n in base]
    columns = {}
    for pos, col in enumerate(spec.categorical):
        needs_ref = spec.has_intercept_column or pos > 0 or bool(spec.absorb)
        plan = _plan_column(col, acc.level_counts.get(col, {}), reference.get(col), min_count, max_levels,
                            needs_ref, (merges or {}).get(col), (drops or {}).get(col))
        for group in plan["columns"]:
            names.append(indicator_name(col, group))
            members = [lvl for lvl, off in plan["column_of"].items() if off == plan["columns"].index(group)]
            sources.append([raw_index[indicator_name(col, lvl)] for lvl in members])
        columns[col] = plan
    names.append(spec.target)
    sources.append([acc.k - 1])
    T = np.zeros((acc.k, len(names)))
    for j, rows in enumerate(sources):
        T[rows, j] = 1.0
    return acc.recoded(T, names), {"names": names, "columns": columns}, T
