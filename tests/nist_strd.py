"""Reader for NIST StRD linear least squares files, read in place from ../shared/reference.

Source: NIST Statistical Reference Datasets, linear least squares regression
(https://www.itl.nist.gov/div898/strd/), certified values computed by NIST in multiple precision.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

STRD_DIR = Path(__file__).resolve().parents[2] / "shared" / "reference" / "nist-strd-lls"

# name -> (polynomial degree or None for Longley's multiple regression, intercept)
MODELS = {
    "Norris": (1, True),
    "Pontius": (2, True),
    "NoInt1": (1, False),
    "NoInt2": (1, False),
    "Filip": (10, True),
    "Longley": (None, True),
    "Wampler1": (5, True),
    "Wampler2": (5, True),
    "Wampler3": (5, True),
    "Wampler4": (5, True),
    "Wampler5": (5, True),
}

NUM = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


@dataclass
class Certified:
    name: str
    features: dict[str, np.ndarray]  # design columns without the intercept, in order
    y: np.ndarray
    intercept: bool
    beta: np.ndarray  # in design order (intercept first when present)
    sd: np.ndarray
    residual_sd: float
    r_squared: float
    regression_ss: float
    residual_ss: float
    f_statistic: float  # inf where NIST prints Infinity


def load(name: str) -> Certified:
    text = (STRD_DIR / f"{name}.dat").read_text(encoding="ascii")
    lines = text.splitlines()
    head = "\n".join(lines[:30])
    c0, c1 = map(int, re.search(r"Certified Values\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", head).groups())
    d0, d1 = map(int, re.search(r"Data\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", head).groups())
    params, resid_sd, r2, reg, res = {}, None, None, None, None
    for ln in lines[c0 - 1 : c1]:
        s = ln.strip()
        if m := re.fullmatch(rf"B(\d+)\s+({NUM})\s+({NUM})", s):
            params[int(m.group(1))] = (float(m.group(2)), float(m.group(3)))
        elif m := re.fullmatch(rf"Standard Deviation\s+({NUM})", s):
            resid_sd = float(m.group(1))
        elif m := re.fullmatch(rf"R-Squared\s+({NUM})", s):
            r2 = float(m.group(1))
        elif m := re.fullmatch(rf"Regression\s+\d+\s+({NUM})\s+({NUM})\s+({NUM}|Infinity)", s):
            reg = (float(m.group(1)), float(m.group(3)) if m.group(3) != "Infinity" else np.inf)
        elif m := re.fullmatch(rf"Residual\s+\d+\s+({NUM})\s+({NUM})", s):
            res = float(m.group(1))
    data = np.array([[float(v) for v in ln.split()] for ln in lines[d0 - 1 : d1]])
    degree, intercept = MODELS[name]
    y = data[:, 0]
    if degree is None:
        feats = {f"x{j}": data[:, j] for j in range(1, data.shape[1])}
    else:
        x = data[:, 1]
        feats = {("x" if d == 1 else f"x^{d}"): x**d for d in range(1, degree + 1)}
    order = sorted(params)
    return Certified(
        name=name,
        features=feats,
        y=y,
        intercept=intercept,
        beta=np.array([params[i][0] for i in order]),
        sd=np.array([params[i][1] for i in order]),
        residual_sd=resid_sd,
        r_squared=r2,
        regression_ss=reg[0],
        residual_ss=res,
        f_statistic=reg[1],
    )


def lre(computed, certified) -> np.ndarray:
    """Log relative error (significant digits of agreement), NIST's measure; capped at 15.

    Where the certified value is 0, the absolute error is used (McCullough, "Assessing the
    reliability of statistical software", The American Statistician 52, 1998).
    """
    computed = np.asarray(computed, dtype=float)
    certified = np.asarray(certified, dtype=float)
    err = np.abs(computed - certified)
    scale = np.where(certified != 0, np.abs(certified), 1.0)
    with np.errstate(divide="ignore"):
        out = -np.log10(err / scale)
    return np.minimum(np.where(err == 0, 15.0, out), 15.0)
