"""Classical inference from the factor alone: no second pass over the data.

Formulas (Seber & Lee, Linear Regression Analysis, 2nd ed., ch. 3-4; Greene, Econometric
Analysis, ch. 4-5), with RSS = ρ², s² = RSS / (n − p), Var(β) = s² R11⁻¹ R11⁻ᵀ:

* with an intercept in column 0, TSS = ‖r12[1:]‖² + ρ² and the regression sum of squares is
  ‖r12[1:]‖² (R[0, :] carries the means); without one, R² is the uncentred 1 − RSS / Σy², as
  NIST StRD certifies for its no-intercept sets;
* Gaussian log-likelihood at the MLE of σ²: −n/2 (log(2π RSS / n) + 1);
* AIC = −2 log L + 2p and BIC = −2 log L + p log n, with p the number of coefficients (σ² not
  counted: the convention of statsmodels' OLS, so values compare directly).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular

from tallfit.errors import DesignError
from tallfit.solve.distributions import f_sf, t_ppf, t_sf


@dataclass
class Inference:
    estimate: np.ndarray
    std_error: np.ndarray
    t: np.ndarray
    p_value: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    cov: np.ndarray
    conf_level: float
    n_used: int
    df_model: int
    df_resid: int
    rss: float
    regression_ss: float
    tss: float
    residual_std: float
    r_squared: float
    adj_r_squared: float
    f_statistic: float
    f_p_value: float
    log_likelihood: float
    aic: float
    bic: float
    centered: bool


def unscaled_covariance(R11: np.ndarray) -> np.ndarray:
    """(X'X)⁻¹ = R11⁻¹ R11⁻ᵀ, computed from the triangular inverse (never from X'X)."""
    p = R11.shape[0]
    Rinv = solve_triangular(R11, np.eye(p))
    return Rinv @ Rinv.T


def infer(
    R11: np.ndarray,
    r12: np.ndarray,
    rho: float,
    beta: np.ndarray,
    n_used: int,
    intercept: bool,
    conf_level: float = 0.95,
    rss: float | None = None,
    log_weight_sum: float = 0.0,
    absorbed_levels: int = 0,
) -> Inference:
    """All the classical statistics of an OLS fit from its factor and row count.

    Weighted fits: the factor is of √w-scaled rows; ``n_used`` is the number of observations
    that count for degrees of freedom (rows with w > 0 for analytic weights, Σw for frequency
    weights) and ``log_weight_sum`` = Σ log w enters the Gaussian log-likelihood as in
    statsmodels' WLS. ``absorbed_levels`` (G) are parameters swept out by an absorbed key:
    residual degrees of freedom n − G − p (Frisch–Waugh–Lovell).
    """
    if not 0.0 < conf_level < 1.0:
        raise DesignError(f"confidence level must be between 0 and 1 (got {conf_level})")
    p = R11.shape[0]
    if n_used <= p + absorbed_levels:
        raise DesignError(
            f"{n_used} usable rows for {p + absorbed_levels} coefficients: inference needs more rows than "
            "coefficients; supply more data or fewer features"
        )
    df_resid = n_used - p - absorbed_levels
    rss = rho * rho if rss is None else rss
    s2 = rss / df_resid
    cov = s2 * unscaled_covariance(R11)
    se = np.sqrt(np.maximum(np.diagonal(cov), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = beta / se
    p_value = 2.0 * t_sf(np.abs(t), df_resid)
    q = t_ppf(0.5 + conf_level / 2.0, df_resid)
    centered = bool(intercept)
    reg_ss = float(np.sum(r12[1:] ** 2)) if centered else float(np.sum(r12**2))
    tss = reg_ss + rss
    df_model = p - 1 if centered else p
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - rss / tss if tss > 0 else float("nan")
        dof_ratio = (n_used - 1) / df_resid if centered else n_used / df_resid
        adj = 1.0 - (1.0 - r2) * dof_ratio
        if df_model > 0:
            f = (reg_ss / df_model) / s2 if s2 > 0 else float("inf")
            f_p = float(f_sf(f, df_model, df_resid)) if np.isfinite(f) else 0.0
        else:
            f, f_p = float("nan"), float("nan")
        llf = -0.5 * n_used * (np.log(2.0 * np.pi * rss / n_used) + 1.0) + 0.5 * log_weight_sum
    return Inference(
        estimate=beta,
        std_error=se,
        t=t,
        p_value=p_value,
        ci_low=beta - q * se,
        ci_high=beta + q * se,
        cov=cov,
        conf_level=conf_level,
        n_used=int(n_used),
        df_model=int(df_model),
        df_resid=int(df_resid),
        rss=float(rss),
        regression_ss=reg_ss,
        tss=float(tss),
        residual_std=float(np.sqrt(s2)),
        r_squared=float(r2),
        adj_r_squared=float(adj),
        f_statistic=float(f),
        f_p_value=float(f_p),
        log_likelihood=float(llf),
        aic=float(-2.0 * llf + 2.0 * p),
        bic=float(-2.0 * llf + p * np.log(n_used)),
        centered=centered,
    )
