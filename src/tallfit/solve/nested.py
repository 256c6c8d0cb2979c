"""Nested-model F tests from the factor: does adding these terms help? No refit, no data pass.

For a model M0 inside M1 (every term of M0 is in M1), with RSS and residual df of each,

    F = ((RSS0 − RSS1) / (df0 − df1)) / (RSS1 / df1),   on (df0 − df1, df1) degrees of freedom

(Seber & Lee, Linear Regression Analysis, 2nd ed., §4.3). Each RSS is the squared last diagonal
entry of the factor of [X_M | y], re-triangularised from the full factor. The sequential table
(terms added in design order) reads straight off the factor: term j adds r12[j]² to the
regression sum of squares (NUMERICS.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tallfit.errors import DesignError
from tallfit.solve.distributions import f_sf
from tallfit.solve.exact import find_aliases
from tallfit.solve.selection import subset_factor, subset_rss


@dataclass
class NestedTest:
    """The F test of the terms in ``added`` given those in ``base``."""

    base: list[str]
    added: list[str]
    rss_base: float
    rss_full: float
    df_base: int
    df_full: int
    f_statistic: float
    p_value: float

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def _columns(names: list[str], terms: list[str], where: str) -> list[int]:
    idx = {n: i for i, n in enumerate(names)}
    missing = [t for t in terms if t not in idx]
    if missing:
        raise DesignError(
            f"{where}: {', '.join(repr(m) for m in missing)} not among the model's terms ({', '.join(names)})"
        )
    return sorted(idx[t] for t in terms)


def nested_f_test(R: np.ndarray, n: int, names: list[str], base: list[str], added: list[str]) -> NestedTest:
    """F test of adding ``added`` to the model with ``base`` (names of design columns of R)."""
    design = names[: R.shape[0] - 1]
    b = _columns(design, base, "base model")
    a = _columns(design, added, "terms to test")
    if not a:
        raise DesignError("name at least one term to test")
    if set(a) & set(b):
        raise DesignError("a term to test is already in the base model; list each term on one side only")
    full = sorted(b + a)
    _, aliases = find_aliases(subset_factor(R, full), [design[j] for j in full])
    if aliases:
        raise DesignError(
            f"the larger model has aliased terms ({'; '.join(x.describe() for x in aliases)}), so the "
            "test's degrees of freedom are undefined; remove them first"
        )
    df_full, df_base = n - len(full), n - len(b)
    if df_full <= 0:
        raise DesignError(f"{n} rows for {len(full)} coefficients: the F test needs more rows than coefficients")
    rss_b, rss_f = subset_rss(R, b), subset_rss(R, full)
    f = ((rss_b - rss_f) / (df_base - df_full)) / (rss_f / df_full)
    p = float(f_sf(f, df_base - df_full, df_full))
    return NestedTest([design[j] for j in b], [design[j] for j in a], rss_b, rss_f, df_base, df_full, float(f), p)


def sequential_table(R: np.ndarray, n: int, names: list[str], intercept: bool) -> list[dict]:
    """Sequential (type I) sums of squares: each term's gain when added after the ones before it."""
    p = R.shape[0] - 1
    _, aliases = find_aliases(R, names[:p])
    if aliases:
        raise DesignError("the sequential table needs a design without aliased terms; remove them first")
    rss = float(R[p, p] ** 2)
    df_resid = n - p
    s2 = rss / df_resid
    rows = []
    for j in range(1 if intercept else 0, p):
        ss = float(R[j, p] ** 2)
        f = ss / s2
        rows.append({"term": names[j], "df": 1, "sum_sq": ss, "f_statistic": f,
                     "p_value": float(f_sf(f, 1, df_resid))})
    rows.append({"term": "residual", "df": df_resid, "sum_sq": rss})
    return rows
