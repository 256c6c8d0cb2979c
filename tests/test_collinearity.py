"""VIF, standardised estimates and the standardised design's condition, against references.

References: statsmodels' variance_inflation_factor (statsmodels.stats.outliers_influence) on
statsmodels.datasets longley (Longley 1967) and statecrime; standardised estimates as the OLS
coefficients of z-scored data (statsmodels OLS); condition number by numpy.linalg.cond.
Thresholds (VIF 10, condition 30) are common practice.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.modelfile import encode_json

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.outliers_influence import variance_inflation_factor  # noqa: E402

CASES = [
    ("longley", "TOTEMP", ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]),
    ("statecrime", "murder", ["hs_grad", "poverty", "single", "white", "urban"]),
]


def _fit(name, target, feats, intercept=True):
    df = getattr(sm.datasets, name).load_pandas().data
    table = pa.table({c: df[c].to_numpy(float) for c in feats + [target]})
    return df, tallfit.fit(table, target=target, features=feats, intercept=intercept, batch_rows=4)


@pytest.mark.parametrize("intercept", [True, False])
@pytest.mark.parametrize("name,target,feats", CASES)
def test_vif_equals_statsmodels(name, target, feats, intercept):
    df, fit = _fit(name, target, feats, intercept)
    X = df[feats].to_numpy(float)
    if intercept:
        X = sm.add_constant(X, prepend=True)
    first = 1 if intercept else 0
    # statsmodels; without a constant, its classic uncentred form (standardize=False: its default
    # centres the columns first, which is the with-intercept VIF)
    ref = [variance_inflation_factor(X, j, standardize=intercept) for j in range(first, X.shape[1])]
    np.testing.assert_allclose(fit.collinearity().vif, ref, rtol=1e-8)


@pytest.mark.parametrize("name,target,feats", CASES)
def test_standardised_estimates_equal_ols_on_zscores(name, target, feats):
    df, fit = _fit(name, target, feats)
    X = df[feats].to_numpy(float)
    y = df[target].to_numpy(float)
    Z = (X - X.mean(0)) / X.std(0, ddof=1)
    zy = (y - y.mean()) / y.std(ddof=1)
    ref = sm.OLS(zy, sm.add_constant(Z, prepend=True)).fit().params[1:]  # statsmodels on z-scores
    np.testing.assert_allclose(fit.collinearity().std_estimate, ref, rtol=1e-8)
    Xc = X - X.mean(0)
    cond = np.linalg.cond(Xc / np.linalg.norm(Xc, axis=0))  # numpy, centred unit-length columns
    np.testing.assert_allclose(fit.collinearity().condition, cond, rtol=1e-8)


def test_longley_warns_in_summary_and_json():
    _, fit = _fit(*CASES[0])
    text = fit.summary()
    assert "variance inflation above 10" in text and "standardised design has condition number" in text
    doc = json.loads(encode_json(fit.to_dict()))
    assert doc["collinearity"]["warnings"] and doc["collinearity"]["thresholds"]["source"] == "common practice"
    gnp = next(t for t in doc["terms"] if t["name"] == "GNP")
    assert gnp["vif"] > 10 and gnp["std_estimate"] is not None
    assert next(t for t in doc["terms"] if t["name"] == "(intercept)")["vif"] is None


def test_warnings_follow_the_thresholds():
    _, fit = _fit(*CASES[1])
    col = fit.collinearity()
    assert bool([w for w in col.warnings if "inflation" in w]) == bool(max(col.vif) > 10)
    assert bool([w for w in col.warnings if "condition" in w]) == bool(col.condition > 30)
