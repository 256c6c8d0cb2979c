"""The second pass with frequency weights: a row of weight w stands for w equal rows.

References: statsmodels OLS on the rows repeated w times (np.repeat), with cov_type HC0–HC3 and
"cluster" (CRV1, use_t=True), het_breuschpagan and the hat-matrix diagonal; data sets statsmodels
ships: ccard (Greene's credit-card expenditure data) and grunfeld (firm-year investment panel).
The repetition counts 1, 2, 3, 1, 2, 3, … are ours (any counts would do). The binned residual
sums, the fitted × residual histogram and the residual sketch are checked against the same pass
over the repeated rows (a property: both describe the same data).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.engine.second_pass import second_pass
from tallfit.solve.robust import robust_for_model

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.diagnostic import het_breuschpagan  # noqa: E402

RTOL = 1e-8
CCARD = ["AGE", "INCOME", "INCOMESQ", "OWNRENT"]


def _close(a, b, rtol=RTOL):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=0)


def _reps(n: int) -> np.ndarray:
    return np.arange(n) % 3 + 1


@pytest.fixture(scope="module")
def ccard():
    d = sm.datasets.ccard.load_pandas().data
    r = _reps(len(d))
    cols = {c: d[c].to_numpy(float) for c in CCARD + ["AVGEXP"]}
    weighted = pa.table({**cols, "n": r.astype(float)})
    repeated = pa.table({c: np.repeat(v, r) for c, v in cols.items()})
    X = np.repeat(sm.add_constant(d[CCARD].to_numpy(float)), r, axis=0)
    return weighted, repeated, X, np.repeat(d.AVGEXP.to_numpy(float), r)


def _fit(table, **kw):
    return tallfit.fit(table, "AVGEXP", CCARD, batch_rows=16, **kw)


@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC2", "HC3"])
def test_hc_errors_equal_statsmodels_on_repeated_rows(kind, ccard):
    weighted, _, X, y = ccard
    model = _fit(weighted, weights="n", weight_kind="frequency", robust=kind)
    ref = sm.OLS(y, X).fit(cov_type=kind)
    _close(model.robust["estimators"][kind]["covariance"], ref.cov_params())
    assert model.robust["n_used"] == len(y)


def test_all_four_leverage_and_breusch_pagan_equal_statsmodels(ccard):
    weighted, _, X, y = ccard
    model = _fit(weighted, weights="n", weight_kind="frequency")
    sp = second_pass(model, weighted, robust="all", batch_rows=16)
    r = robust_for_model(model, sp.sandwich, sp.clusters, "all")
    ref = sm.OLS(y, X).fit()
    for kind in ("HC0", "HC1", "HC2", "HC3"):
        _close(r["estimators"][kind]["covariance"], ref.get_robustcov_results(cov_type=kind).cov_params())
    h = ref.get_influence().hat_matrix_diag
    _close(sp.sandwich.max_leverage, h.max(), rtol=1e-10)
    _close(sp.top_leverage.values, np.unique(h)[::-1][: len(sp.top_leverage.values)], rtol=1e-10)
    lm, lm_p, f, f_p = het_breuschpagan(ref.resid, X)
    bp = sp.breusch_pagan.result()
    _close([bp["statistic"], bp["p_value"], bp["f_statistic"], bp["f_p_value"]], [lm, lm_p, f, f_p])
    assert sp.sandwich.normal_equations_residual() < 1e-10  # Σ wᵢeᵢzᵢ = 0 on the fitting data


def test_diagnostics_equal_the_pass_over_repeated_rows(ccard):
    weighted, repeated, X, y = ccard
    a = second_pass(_fit(weighted, weights="n", weight_kind="frequency"), weighted, batch_rows=16)
    b = second_pass(_fit(repeated), repeated, batch_rows=16)
    assert a.n_used == len(weighted) and b.n_used == len(y)
    np.testing.assert_allclose(a.feature_bins.sums, b.feature_bins.sums, rtol=1e-9, atol=1e-8)
    np.testing.assert_allclose(a.fitted_bins.sums, b.fitted_bins.sums, rtol=1e-9, atol=1e-8)
    np.testing.assert_array_equal(a.heat, b.heat)
    ra, rb = a.residuals.summary(), b.residuals.summary()
    assert ra["n"] == rb["n"] == len(y)
    for key in ("mae", "rmse", "skewness", "excess_kurtosis", "min", "max"):
        _close(ra[key], rb[key], rtol=1e-9)
    _close(list(ra["quantiles"].values()), list(rb["quantiles"].values()), rtol=1e-9)
    largest = np.unique(np.abs(sm.OLS(y, X).fit().resid))[::-1]  # each row once, not once per repeat
    _close(a.top_residuals.values, largest[: len(a.top_residuals.values)], rtol=1e-9)


def test_report_on_a_frequency_weighted_model_has_robust_errors(ccard):
    from tallfit.api import diagnose

    weighted, _, X, y = ccard
    out = diagnose(_fit(weighted, weights="n", weight_kind="frequency"), weighted, robust="HC1")
    _close(out["model"].robust["estimators"]["HC1"]["std_error"], sm.OLS(y, X).fit(cov_type="HC1").bse)


@pytest.fixture(scope="module")
def grunfeld():
    d = sm.datasets.grunfeld.load_pandas().data
    r = _reps(len(d))
    table = pa.table({"invest": d.invest.to_numpy(float), "value": d.value.to_numpy(float),
                      "capital": d.capital.to_numpy(float), "firm": d.firm.astype(str).to_numpy(),
                      "year": d.year.to_numpy(float), "n": r.astype(float)})
    firm = np.unique(d.firm.astype(str), return_inverse=True)[1]
    year = np.unique(d.year, return_inverse=True)[1]
    return d, table, r, firm, year


def test_clustered_errors_equal_statsmodels_on_repeated_rows(grunfeld):
    d, table, r, firm, _ = grunfeld
    model = tallfit.fit(table, "invest", ["value", "capital"], weights="n", weight_kind="frequency",
                        cluster="firm", batch_rows=23)
    X = np.repeat(sm.add_constant(d[["value", "capital"]].to_numpy(float)), r, axis=0)
    ref = sm.OLS(np.repeat(d.invest.to_numpy(float), r), X).fit(
        cov_type="cluster", cov_kwds={"groups": np.repeat(firm, r)}, use_t=True)
    est = model.robust["estimators"]["cluster:firm"]
    _close(est["covariance"], ref.cov_params())
    _close(est["p_value"], ref.pvalues, rtol=1e-7)


def test_absorbed_key_with_frequency_weights_equals_dummies_on_repeated_rows(grunfeld):
    """Firm absorbed: the fit with one indicator per firm on the repeated rows (statsmodels); HC1
    counts the 10 firms as parameters, clustering by year does too (the firms are not nested in
    years)."""
    d, table, r, _, year = grunfeld
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm", weights="n",
                        weight_kind="frequency", batch_rows=23)
    sp = second_pass(model, table, cluster=["year"], robust="all", batch_rows=23)
    firms = sorted(set(d.firm.astype(str)))
    D = (d.firm.astype(str).to_numpy()[:, None] == np.array(firms)[None, :]).astype(float)
    X = np.repeat(np.column_stack([d[["value", "capital"]].to_numpy(float), D]), r, axis=0)
    y = np.repeat(d.invest.to_numpy(float), r)
    hc = robust_for_model(model, sp.sandwich, [], "all", swept=sp.levels_used)
    for kind in ("HC0", "HC1", "HC2", "HC3"):
        _close(hc["estimators"][kind]["covariance"], sm.OLS(y, X).fit(cov_type=kind).cov_params()[:2, :2])
    cl = robust_for_model(model, sp.sandwich, sp.clusters, None, swept=sp.levels_used)["estimators"]["cluster:year"]
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": np.repeat(year, r)}, use_t=True)
    _close(cl["covariance"], ref.cov_params()[:2, :2])
    _close(sp.sandwich.max_leverage, sm.OLS(y, X).fit().get_influence().hat_matrix_diag.max(), rtol=1e-10)
