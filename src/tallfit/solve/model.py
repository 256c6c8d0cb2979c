"""From an accumulator to a fitted model: rank checks, coefficients, inference, warnings."""

from __future__ import annotations

from typing import Any

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.spec import ModelSpec
from tallfit.errors import AliasedTermsError, DesignError
from tallfit.results import FitResult, build_result
from tallfit.solve.exact import DEFAULT_RANK_TOL, ExactSolution, solve_exact
from tallfit.solve.inference import infer

LOW_DIGITS = 6.0  # common practice: fewer than ~6 trusted digits deserves a remark


def _no_rows_message(acc: FactorAccumulator) -> str:
    if acc.n_read == 0:
        return "the data has no rows"
    worst = sorted(acc.dropped_by_column.items(), key=lambda kv: -kv[1])
    detail = ", ".join(f"{name}: {count}" for name, count in worst[:5])
    return (
        f"no usable rows: all {acc.n_read} rows read have a missing or non-finite value in a "
        f"model column (rows missing per column: {detail}); check those columns or drop them"
    )


def check_aliases(sol: ExactSolution, on_aliased: str) -> list[str]:
    """Raise for aliased terms unless asked to drop them; return the warnings to show."""
    if not sol.aliases:
        return []
    relations = "; ".join(a.describe() for a in sol.aliases)
    names = ", ".join(a.term for a in sol.aliases)
    if on_aliased == "error":
        raise AliasedTermsError(
            f"aliased terms: {names} (each is a linear combination of earlier terms, so its "
            f"effect cannot be separated: {relations}). Remove them, or fit without them by "
            "passing --drop-aliased (drop_aliased=True)",
            [a.term for a in sol.aliases],
        )
    if on_aliased != "drop":
        raise ValueError(f"on_aliased must be 'error' or 'drop', not {on_aliased!r}")
    return [f"fitted without aliased terms {names} ({relations})"]


def observations(spec: ModelSpec, acc: FactorAccumulator) -> tuple[int, float]:
    """Observations for degrees of freedom, and Σ log w for the likelihood.

    Analytic (precision) weights: each used row with w > 0 is one observation and Σ log w enters
    the likelihood (statsmodels WLS). Frequency weights: a row of weight w stands for w identical
    rows, so n = Σw and the likelihood is that of the expanded data.
    """
    if not spec.weights or acc.weight_sum is None:
        return acc.n_used, 0.0
    if spec.weight_kind == "frequency":
        return int(round(acc.weight_sum)), 0.0
    return acc.n_used, float(acc.weight_log_sum or 0.0)


def absorb_statistics(inf, absorbed: dict, G: int) -> None:
    """With an absorbed key: R² over the grand mean (as a fit with one indicator per level would
    report it), the within R² kept apart, and AIC/BIC counting the G absorbed parameters."""
    import numpy as _np

    within = inf.r_squared
    tss = float(absorbed["total_ss"])
    inf.tss = tss
    inf.centered = True  # the levels' effects span the constant
    inf.r_squared = 1.0 - inf.rss / tss if tss > 0 else float("nan")
    inf.adj_r_squared = 1.0 - (1.0 - inf.r_squared) * (inf.n_used - 1) / inf.df_resid
    k = len(inf.estimate) + G
    inf.aic = -2.0 * inf.log_likelihood + 2.0 * k
    inf.bic = -2.0 * inf.log_likelihood + k * _np.log(inf.n_used)
    absorbed["r_squared_within"] = within


def fit_from_accumulator(
    spec: ModelSpec,
    acc: FactorAccumulator,
    *,
    on_aliased: str = "error",
    rank_tol: float = DEFAULT_RANK_TOL,
    conf_level: float = 0.95,
    beta: np.ndarray | None = None,
    rss: float | None = None,
    absorbed: dict | None = None,
    **extra: Any,
) -> FitResult:
    """Solve and infer from the factor alone (``beta``/``rss`` override the factor's, after refinement)."""
    if acc.n_used == 0:
        raise DesignError(_no_rows_message(acc))
    G = int(absorbed["levels"]) if absorbed else 0
    p = len(acc.names) - 1 + G
    if acc.n_used <= p:
        raise DesignError(
            f"{acc.n_used} usable rows for {p} coefficients: a fit with inference needs more rows "
            "than coefficients; supply more data or fewer features"
        )
    sol = solve_exact(acc.R, acc.names, rank_tol)
    warnings = check_aliases(sol, on_aliased)
    if beta is not None:
        sol.beta = np.asarray(beta, dtype=np.float64)
    n_obs, log_w = observations(spec, acc)
    inference = infer(
        sol.R11, sol.r12, sol.rho, sol.beta, n_obs, spec.has_intercept_column, conf_level,
        rss=rss, log_weight_sum=log_w, absorbed_levels=G,
    )
    if absorbed:
        absorb_statistics(inference, absorbed, G)
    missing = {k: v for k, v in acc.dropped_by_column.items() if not k.startswith("(")}
    if missing:
        warnings.append(
            f"rows dropped for missing or non-finite values, per column: "
            f"{', '.join(f'{k} {v}' for k, v in sorted(missing.items()))} (a row missing in two "
            "columns counts in both); if values are not missing at random this biases the fit"
        )
    if sol.trusted_digits < LOW_DIGITS and extra.get("refinement") is None:
        warnings.append(
            f"only about {sol.trusted_digits:.0f} significant digits of the coefficients can be "
            f"trusted (scaled condition number {sol.condition:.2g}); a refinement pass (--refine) "
            "recovers digits lost to rounding, and removing nearly collinear terms or centring "
            "features helps more"
        )
    return build_result(spec, acc, sol, inference, warnings=warnings, **extra)
