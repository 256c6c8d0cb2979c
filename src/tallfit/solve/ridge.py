"""Ridge regression from the factor: a whole penalty path from one small SVD, and its CV error.

The model has an unpenalised intercept; the penalty is on standardised features:

    minimise ‖y − a − X b‖² + λ Σ_j (s_j b_j)²,      s_j the sample standard deviation of x_j,

so λ means the same whatever the units of the features (Hoerl & Kennard, Technometrics 12, 1970;
Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., §3.4.1). With the
intercept in column 0, R[1:, 1:] is the factor of the centred [X | y] (NUMERICS.md): R22 =
R[1:p, 1:p], r2 = R[1:p, p]. With D = diag(s) and the SVD R22 D⁻¹ = U S Vᵀ, for every λ

    b(λ) = D⁻¹ V diag(σ/(σ² + λ)) Uᵀ r2,   a(λ) = ȳ − x̄ᵀ b(λ),   df(λ) = Σ σ²/(σ² + λ),

which equals the closed form (X_cᵀX_c + λD²)⁻¹ X_cᵀ y_c without ever forming X'X. Means come
from the first row of R (R[0, j] / R[0, 0] = x̄_j). In cross-validation each training factor is
standardised with its own scales, as a refit on the training rows would be.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tallfit.accumulate.folds import heldout_sse
from tallfit.errors import DesignError
from tallfit.solve.exact import DEFAULT_RANK_TOL

DEFAULT_PATH_LENGTH = 50


@dataclass
class RidgeSolution:
    """Coefficients for a list of penalties from one factor: intercept first, then the features."""

    penalties: np.ndarray  # (L,)
    coef: np.ndarray  # (L, p): row l is [a, b_1, ..., b_{p-1}] at penalties[l]
    df: np.ndarray  # (L,) effective degrees of freedom of the features (the intercept adds 1)
    scales: np.ndarray  # (p - 1,) feature standard deviations used for the penalty
    singular_values: np.ndarray  # of the standardised centred design, R22 D⁻¹


def _centred_parts(R: np.ndarray, n: int):
    """Centred feature factor, target part, feature scales, means; constant columns zeroed.

    A feature constant in these rows (e.g. a level absent from a training fold) has no scale;
    its column is set to zero, so its coefficient is zero for every penalty.
    """
    p = R.shape[0] - 1
    if p < 2:
        raise DesignError("ridge needs at least one feature besides the intercept")
    if n < 2:
        raise DesignError(f"ridge needs at least 2 rows, got {n}")
    R22 = R[1:p, 1:p].copy()
    r2 = R[1:p, p]
    centred_norm = np.linalg.norm(R22, axis=0)
    const = centred_norm <= DEFAULT_RANK_TOL * np.linalg.norm(R[:p, 1:p], axis=0)
    R22[:, const] = 0.0
    scales = np.where(const, 1.0, centred_norm / np.sqrt(n - 1.0))
    means = R[0, :] / R[0, 0]
    return R22, r2, scales, means[1:p], means[p]


def ridge_path(R: np.ndarray, n: int, penalties) -> RidgeSolution:
    """Ridge coefficients for every penalty from the factor R of [1, X, y] over n rows."""
    lam = np.asarray(penalties, dtype=np.float64).ravel()
    if lam.size == 0 or np.any(~np.isfinite(lam)) or np.any(lam < 0):
        raise DesignError("ridge penalties must be finite and non-negative")
    R22, r2, scales, xbar, ybar = _centred_parts(R, n)
    U, s, Vt = np.linalg.svd(R22 / scales, full_matrices=False)
    z = U.T @ r2
    tiny = s <= s[0] * 1e-13 if s[0] > 0 else np.ones_like(s, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        shrink = s[None, :] / (s[None, :] ** 2 + lam[:, None])  # (L, p-1)
    shrink[:, tiny] = 0.0  # directions the data do not determine get no weight (minimum norm)
    b = ((shrink * z[None, :]) @ Vt) / scales[None, :]
    a = ybar - b @ xbar
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(s[None, :] > 0, s[None, :] ** 2 / (s[None, :] ** 2 + lam[:, None]), 0.0)
    return RidgeSolution(lam, np.column_stack([a, b]), ratio.sum(axis=1), scales, s)


def default_penalties(R: np.ndarray, n: int, count: int = DEFAULT_PATH_LENGTH,
                      low: float | None = None, high: float | None = None) -> np.ndarray:
    """A log-spaced grid from nearly no shrinkage to nearly all (from the squared singular values).

    By default from 1e-4·σ_min² (df ≈ p) to 1e3·σ_max² (df ≈ 0), σ those of the standardised
    centred design; ``low``/``high`` override either end.
    """
    if count < 2:
        raise DesignError(f"a ridge path needs at least 2 penalties, got {count}")
    R22, _, scales, _, _ = _centred_parts(R, n)
    s = np.linalg.svd(R22 / scales, compute_uv=False)
    s = s[s > s[0] * 1e-13] if s[0] > 0 else s
    if s.size == 0 or s[0] == 0:
        raise DesignError("every feature is constant in the training rows: there is no ridge path to compute")
    lo = low if low is not None else 1e-4 * float(s[-1]) ** 2
    hi = high if high is not None else 1e3 * float(s[0]) ** 2
    if not (0 < lo < hi and np.isfinite(hi)):
        raise DesignError(f"the ridge penalty range must satisfy 0 < low < high, got {lo!r} … {hi!r}")
    return np.geomspace(lo, hi, count)


@dataclass
class PathCV:
    """Cross-validated mean squared error along a penalty path."""

    fold_mse: np.ndarray  # (k, L)
    fold_n: np.ndarray  # (k,)
    mean: np.ndarray  # (L,) mean of the fold MSEs
    se: np.ndarray  # (L,) their standard error: sd / √k
    best: int  # index of the minimum mean
    one_se: int  # largest penalty whose mean is within one SE of the minimum


def cv_path(train_factors, heldout_factors, penalties) -> PathCV:
    """CV error of the whole path: fold j trained on ``train_factors[j]`` and scored on ``heldout_factors[j]``.

    Both are sequences of FactorAccumulator; held-out errors come from the held-out factors alone.
    """
    k = len(heldout_factors)
    lam = np.asarray(penalties, dtype=np.float64)
    mse = np.empty((k, lam.size))
    n_j = np.empty(k, dtype=np.int64)
    cols = list(range(heldout_factors[0].k - 1))
    for j, (train, held) in enumerate(zip(train_factors, heldout_factors)):
        sol = ridge_path(train.R, train.n_used, lam)
        n_j[j] = held.n_used
        if held.n_used == 0:
            raise DesignError(f"fold {j + 1} of {k} has no rows; use fewer folds or a key with more values")
        mse[j] = heldout_sse(held.R, cols, sol.coef.T) / held.n_used
    mean = mse.mean(axis=0)
    se = mse.std(axis=0, ddof=1) / np.sqrt(k)
    best = int(np.argmin(mean))
    # the one-standard-error rule: the largest penalty (simplest model) within one SE of the minimum
    within = np.flatnonzero(mean <= mean[best] + se[best])
    one_se = int(within[np.argmax(lam[within])])
    return PathCV(mse, n_j, mean, se, best, one_se)


def ridge_fit_result(base, acc, penalty: float, chosen_by: str):
    """A normal FitResult (usable by predict and the model file) for the ridge fit at ``penalty``.

    ``base`` is the ordinary fit on the same factor. Standard errors, tests and intervals are
    not defined for a penalised fit here, so they are NaN; the penalty, its scales and the
    effective degrees of freedom are recorded in ``options["ridge"]``.
    """
    from tallfit.results import FitResult
    from tallfit.solve.inference import Inference

    names = acc.names[:-1]
    if not base.spec.intercept:
        raise DesignError("ridge here keeps an unpenalised intercept: fit with the intercept")
    sol = ridge_path(acc.R, acc.n_used, [penalty])
    beta = sol.coef[0]
    p, n = beta.size, acc.n_used
    rss = float(heldout_sse(acc.R, list(range(p)), beta))
    tss = float(np.sum(acc.R[1:, -1] ** 2))
    nan_p = np.full(p, np.nan)
    inference = Inference(
        estimate=beta, std_error=nan_p, t=nan_p.copy(), p_value=nan_p.copy(), ci_low=nan_p.copy(),
        ci_high=nan_p.copy(), cov=np.full((p, p), np.nan), conf_level=base.inference.conf_level,
        n_used=int(n), df_model=p - 1, df_resid=int(n - p), rss=rss, regression_ss=tss - rss, tss=tss,
        residual_std=float("nan"), r_squared=1.0 - rss / tss if tss > 0 else float("nan"),
        adj_r_squared=float("nan"), f_statistic=float("nan"), f_p_value=float("nan"),
        log_likelihood=float("nan"), aic=float("nan"), bic=float("nan"), centered=True,
    )
    info = {
        "penalty": float(penalty),
        "chosen_by": chosen_by,
        "effective_df": float(sol.df[0]),
        "penalised": "sum of (sd_j * b_j)^2 over the features, sd_j the sample standard deviation; "
                     "intercept unpenalised; objective RSS + penalty * that sum",
        "scales": {name: float(s) for name, s in zip(names[1:], sol.scales)},
        "residual_sd": float(np.sqrt(rss / max(n - 1 - sol.df[0], 1.0))),
    }
    return FitResult(
        spec=base.spec,
        terms=list(names),
        inference=inference,
        aliased=[],
        accumulator=acc,
        condition_number=base.condition_number,
        digits=np.full(p, base.trusted_digits),
        solver=f"ridge-svd (penalty {penalty:.4g})",
        source=dict(base.source),
        options={**base.options, "ridge": info},
        coding=base.coding,
        warnings=[
            f"ridge fit with penalty {penalty:.4g} ({chosen_by}), effective df {sol.df[0]:.2f} of "
            f"{p - 1}: estimates are shrunk toward zero on purpose, so no standard errors, tests or "
            "intervals are given (predict's intervals come out empty)"
        ],
    )
