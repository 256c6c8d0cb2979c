"""Inference against statsmodels' OLS on open data sets that statsmodels ships.

Reference library: statsmodels (statsmodels.regression.linear_model.OLS), data from
statsmodels.datasets (stackloss: Brownlee 1965; ccard: Greene, Econometric Analysis;
fair: Fair 1978; statecrime: US state crime data). Agreement is asked to 1e-9 relative.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit

sm = pytest.importorskip("statsmodels.api")

CASES = [
    ("stackloss", "STACKLOSS", ["AIRFLOW", "WATERTEMP", "ACIDCONC"]),
    ("ccard", "AVGEXP", ["AGE", "INCOME", "INCOMESQ", "OWNRENT"]),
    ("fair", "affairs", ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]),
    ("statecrime", "murder", ["hs_grad", "poverty", "single", "white", "urban"]),
]
RTOL = 1e-9


def _close(a, b, rtol=RTOL):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=0)


def _fit_both(dataset, target, features, intercept, batch_rows):
    df = getattr(sm.datasets, dataset).load_pandas().data
    table = pa.table({c: df[c].to_numpy(dtype=float) for c in features + [target]})
    ours = tallfit.fit(table, target=target, features=features, intercept=intercept, batch_rows=batch_rows)
    X = df[features].to_numpy(dtype=float)
    if intercept:
        X = sm.add_constant(X, prepend=True)
    ref = sm.OLS(df[target].to_numpy(dtype=float), X).fit()
    return ours, ref


@pytest.mark.parametrize("intercept", [True, False])
@pytest.mark.parametrize("dataset,target,features", CASES)
def test_inference_matches_statsmodels(dataset, target, features, intercept):
    ours, ref = _fit_both(dataset, target, features, intercept, batch_rows=5)
    inf = ours.inference
    _close(inf.estimate, ref.params)
    _close(inf.std_error, ref.bse)
    _close(inf.t, ref.tvalues)
    _close(inf.p_value, ref.pvalues, rtol=1e-7)  # tiny p-values: tail functions agree to ~1e-8
    ci = ref.conf_int(alpha=0.05)
    _close(inf.ci_low, ci[:, 0])
    _close(inf.ci_high, ci[:, 1])
    _close(inf.cov, ref.cov_params())
    _close(inf.r_squared, ref.rsquared)
    _close(inf.adj_r_squared, ref.rsquared_adj)
    _close(inf.f_statistic, ref.fvalue)
    _close(inf.f_p_value, ref.f_pvalue, rtol=1e-7)
    _close(inf.log_likelihood, ref.llf)
    _close(inf.aic, ref.aic)
    _close(inf.bic, ref.bic)
    _close(inf.residual_std, np.sqrt(ref.scale))
    assert inf.df_resid == ref.df_resid
    assert inf.df_model == ref.df_model


def test_confidence_level_is_selectable():
    df = sm.datasets.stackloss.load_pandas().data
    feats = ["AIRFLOW", "WATERTEMP", "ACIDCONC"]
    table = pa.table({c: df[c].to_numpy(dtype=float) for c in feats + ["STACKLOSS"]})
    ours = tallfit.fit(table, target="STACKLOSS", features=feats, conf_level=0.9)
    ref = sm.OLS(df["STACKLOSS"].to_numpy(), sm.add_constant(df[feats].to_numpy())).fit()
    ci = ref.conf_int(alpha=0.10)
    _close(ours.inference.ci_low, ci[:, 0])
    _close(ours.inference.ci_high, ci[:, 1])


def test_prediction_intervals_match_statsmodels():
    df = sm.datasets.ccard.load_pandas().data
    feats = ["AGE", "INCOME", "OWNRENT"]
    table = pa.table({c: df[c].to_numpy(dtype=float) for c in feats + ["AVGEXP"]})
    ours = tallfit.fit(table, target="AVGEXP", features=feats)
    pred = tallfit.predict(ours, table, intervals=True, level=0.9)
    ref = sm.OLS(df["AVGEXP"].to_numpy(), sm.add_constant(df[feats].to_numpy())).fit()
    frame = ref.get_prediction(sm.add_constant(df[feats].to_numpy())).summary_frame(alpha=0.10)
    _close(pred["prediction"].to_numpy(), frame["mean"])
    _close(pred["ci_low"].to_numpy(), frame["mean_ci_lower"])
    _close(pred["ci_high"].to_numpy(), frame["mean_ci_upper"])
    _close(pred["pi_low"].to_numpy(), frame["obs_ci_lower"])
    _close(pred["pi_high"].to_numpy(), frame["obs_ci_upper"])
