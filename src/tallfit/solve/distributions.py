"""The t, F, χ² and normal distribution functions inference needs, from scipy.special.

scipy.stats computes these same functions with these same special functions (t: stdtr/stdtrit,
F: fdtrc, χ²: chdtrc, normal: ndtri), so the values are identical; importing scipy.stats, though,
took ≈ 0.6 s of every command's start here (its distribution classes build their docstrings on
import), against none for scipy.special beside scipy.linalg. Degrees of freedom that are not
positive give NaN, as scipy.stats gives; scalars in give numpy scalars out, as there.
"""

from __future__ import annotations

import numpy as np
from scipy import special


def _valid(*df) -> np.ndarray:
    return np.logical_and.reduce([np.asarray(d, dtype=float) > 0 for d in df])


def t_sf(x, df):
    """P(T > x) for Student's t with df degrees of freedom (df may be inf: the normal)."""
    return np.where(_valid(df), special.stdtr(df, -np.asarray(x, dtype=float)), np.nan)[()]


def t_ppf(q, df):
    """The q quantile of Student's t with df degrees of freedom."""
    return np.where(_valid(df), special.stdtrit(df, q), np.nan)[()]


def f_sf(x, dfn, dfd):
    """P(F > x) for the F distribution with (dfn, dfd) degrees of freedom."""
    return np.where(_valid(dfn, dfd), special.fdtrc(dfn, dfd, x), np.nan)[()]


def chi2_sf(x, df):
    """P(χ² > x) with df degrees of freedom."""
    return np.where(_valid(df), special.chdtrc(df, x), np.nan)[()]


def norm_ppf(p):
    """The p quantile of the standard normal distribution."""
    return special.ndtri(p)


def norm_pdf(x, loc: float = 0.0, scale: float = 1.0):
    """The normal density with mean loc and standard deviation scale."""
    z = (np.asarray(x, dtype=float) - loc) / scale
    return np.exp(-0.5 * z * z) / (scale * np.sqrt(2.0 * np.pi))
