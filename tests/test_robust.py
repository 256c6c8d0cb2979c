"""Robust and cluster-robust covariance from the second pass, against statsmodels.

References: statsmodels OLS(...).fit(cov_type="HC0".."HC3") and cov_type="cluster" (CRV1, its
default use_correction=True and df_correction=True, asked here with use_t=True so p-values use t
on G − 1 df), and statsmodels.stats.sandwich_covariance.cov_cluster_2groups; data sets statsmodels
ships: grunfeld (Grunfeld 1958 firm-year investment panel), fair (Fair 1978). Two-way clustering
is also checked against the inclusion–exclusion formula of Cameron, Gelbach & Miller (JBES 2011)
computed densely here with numpy. Agreement is asked to 1e-8 relative.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.diagnostics.kernels import scatter_rows, scatter_rows_reference
from tallfit.engine.second_pass import second_pass
from tallfit.errors import DesignError
from tallfit.solve.robust import robust_for_model

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.sandwich_covariance import cov_cluster_2groups  # noqa: E402

RTOL = 1e-8


def _close(a, b, rtol=RTOL):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=0)


@pytest.fixture(scope="module")
def grunfeld():
    d = sm.datasets.grunfeld.load_pandas().data
    table = pa.table({
        "invest": d.invest.to_numpy(float), "value": d.value.to_numpy(float),
        "capital": d.capital.to_numpy(float), "firm": d.firm.astype(str).to_numpy(),
        "year": d.year.to_numpy(float),
    })
    X = sm.add_constant(d[["value", "capital"]].to_numpy(float))
    firm = np.unique(d.firm.astype(str), return_inverse=True)[1]
    year = np.unique(d.year, return_inverse=True)[1]
    return table, X, d.invest.to_numpy(float), firm, year


def _ours(table, target, feats, batch_rows=7, cluster=(), selected="HC3"):
    model = tallfit.fit(table, target=target, features=feats, batch_rows=batch_rows)
    sp = second_pass(model, table, cluster=cluster, robust=selected, diagnostics=False, batch_rows=batch_rows)
    return model, robust_for_model(model, sp.sandwich, sp.clusters, selected)


def _shipped(dataset, grunfeld):
    """(table, X with constant, y, target, features) of a data set statsmodels ships."""
    if dataset == "grunfeld":
        table, X, y, _, _ = grunfeld
        return table, X, y, "invest", ["value", "capital"]
    d = sm.datasets.fair.load_pandas().data
    feats = ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]
    table = pa.table({c: d[c].to_numpy(float) for c in feats + ["affairs"]})
    return table, sm.add_constant(d[feats].to_numpy(float)), d["affairs"].to_numpy(float), "affairs", feats


@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC2", "HC3"])
@pytest.mark.parametrize("dataset", ["grunfeld", "fair"])
def test_hc_matches_statsmodels(kind, dataset, grunfeld):
    table, X, y, target, feats = _shipped(dataset, grunfeld)
    _, r = _ours(table, target, feats, batch_rows=500 if dataset == "fair" else 7, selected=kind)
    ref = sm.OLS(y, X).fit(cov_type=kind, use_t=True)
    est = r["estimators"][kind]
    assert r["selected"] == kind
    _close(est["covariance"], ref.cov_params())
    _close(est["std_error"], ref.bse)
    _close(est["t"], ref.tvalues)
    _close(est["p_value"], ref.pvalues, rtol=1e-7)
    ci = ref.conf_int(alpha=0.05)
    _close(est["ci_low"], ci[:, 0])
    _close(est["ci_high"], ci[:, 1])
    assert est["df"] == ref.df_resid


@pytest.mark.parametrize("dataset", ["grunfeld", "fair"])
def test_all_four_from_one_pass_match_statsmodels(dataset, grunfeld):
    """robust="all" sums [w | d·w] once and forms every HC meat from its blocks."""
    table, X, y, target, feats = _shipped(dataset, grunfeld)
    _, r = _ours(table, target, feats, batch_rows=300, selected="all")
    assert r["selected"] == "HC3" and sorted(r["estimators"]) == ["HC0", "HC1", "HC2", "HC3"]
    for kind in ("HC0", "HC1", "HC2", "HC3"):
        _close(r["estimators"][kind]["covariance"], sm.OLS(y, X).fit(cov_type=kind).cov_params())
    _, one = _ours(table, target, feats, batch_rows=300, selected="HC2")
    assert sorted(one["estimators"]) == ["HC2"]


def test_one_way_cluster_matches_statsmodels(grunfeld):
    table, X, y, firm, _ = grunfeld
    _, r = _ours(table, "invest", ["value", "capital"], cluster=["firm"])
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": firm}, use_t=True)
    est = r["estimators"]["cluster:firm"]
    assert r["selected"] == "cluster:firm" and r["clusters"] == {"firm": 11}
    _close(est["covariance"], ref.cov_params())
    _close(est["std_error"], ref.bse)
    _close(est["p_value"], ref.pvalues, rtol=1e-7)
    ci = ref.conf_int(alpha=0.05)
    _close(est["ci_low"], ci[:, 0])
    _close(est["ci_high"], ci[:, 1])
    assert est["df"] == 10
    # 11 firms: far below the 40-50 clusters common practice asks for, so a warning is given
    assert any("only 11 clusters" in n for n in r["notes"])


def _dense_crv1(X, e, groups):
    n, p = X.shape
    bread = np.linalg.inv(X.T @ X)
    G = groups.max() + 1
    S = np.zeros((G, p))
    np.add.at(S, groups, X * e[:, None])
    return bread @ (S.T @ S) @ bread * G / (G - 1) * (n - 1) / (n - p)


def test_two_way_cluster_inclusion_exclusion(grunfeld):
    table, X, y, firm, year = grunfeld
    _, r = _ours(table, "invest", ["value", "capital"], cluster=["firm", "year"])
    est = r["estimators"]["cluster:firm+year"]
    e = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
    pair = np.unique(firm * 100 + year, return_inverse=True)[1]
    # Cameron, Gelbach & Miller (2011), eq. 2.11: V = V_firm + V_year − V_firm∩year
    dense = _dense_crv1(X, e, firm) + _dense_crv1(X, e, year) - _dense_crv1(X, e, pair)
    assert np.linalg.eigvalsh(dense).min() > 0  # positive definite here, so no eigenvalue repair applies
    _close(est["covariance"], dense)
    _close(est["covariance"], cov_cluster_2groups(sm.OLS(y, X).fit(), firm, year)[0])
    assert not any("negative eigenvalue" in n for n in r["notes"])
    assert r["clusters"] == {"firm": 11, "year": 20, "firm×year": 220}
    assert est["df"] == 10  # min(G_firm, G_year) − 1


def test_fit_with_robust_option_and_model_file(tmp_path, grunfeld):
    table, X, y, firm, _ = grunfeld
    model = tallfit.fit(table, target="invest", features=["value", "capital"], robust="hc1", cluster="firm")
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": firm})
    _close(model.robust["estimators"]["cluster:firm"]["std_error"], ref.bse)
    _close(model.robust["estimators"]["HC1"]["std_error"], sm.OLS(y, X).fit(cov_type="HC1").bse)
    assert model.to_dict()["robust"]["selected"] == "cluster:firm"
    assert "cluster:firm errors beside the plain ones" in model.summary()
    path = tmp_path / "m.json"
    tallfit.save(model, path)
    back = tallfit.load(path)
    assert back.robust["selected"] == "cluster:firm"
    _close(back.robust["estimators"]["HC1"]["covariance"], model.robust["estimators"]["HC1"]["covariance"], rtol=0)
    plain = tallfit.fit(table, target="invest", features=["value", "capital"])
    assert plain.robust is None and plain.to_dict()["robust"] is None


def test_cluster_key_errors(grunfeld):
    table, *_ = grunfeld
    model = tallfit.fit(table, target="invest", features=["value", "capital"])
    firm = table.column("firm").to_pylist()
    firm[5] = None
    holed = table.set_column(table.schema.get_field_index("firm"), "firm", pa.array(firm))
    with pytest.raises(DesignError, match="cluster column 'firm' has 1 missing value"):
        second_pass(model, holed, cluster=["firm"], diagnostics=False)
    with pytest.raises(DesignError, match="one or two key columns"):
        second_pass(model, table, cluster=["firm", "year", "value"], diagnostics=False)
    with pytest.raises(tallfit.errors.ColumnNotFoundError, match="'frim' not found"):
        second_pass(model, table, cluster=["frim"], diagnostics=False)


def test_scatter_kernel_matches_reference():
    rng = np.random.default_rng(5)
    codes = rng.integers(0, 37, 2000)
    W = np.asfortranarray(rng.standard_normal((2000, 4)))
    S = np.zeros((37, 4), order="F")
    scatter_rows(codes, W, S)
    np.testing.assert_allclose(S, scatter_rows_reference(codes, W, 37), rtol=1e-12, atol=1e-12)


def test_fit_robust_all_keeps_the_four_and_one_kind_keeps_one(grunfeld):
    table, X, y, _, _ = grunfeld
    both = tallfit.fit(table, target="invest", features=["value", "capital"], robust="all")
    assert both.robust["selected"] == "HC3" and sorted(both.robust["estimators"]) == ["HC0", "HC1", "HC2", "HC3"]
    for kind in ("HC0", "HC2"):
        _close(both.robust["estimators"][kind]["std_error"], sm.OLS(y, X).fit(cov_type=kind).bse)
    one = tallfit.fit(table, target="invest", features=["value", "capital"], robust="HC2")
    assert sorted(one.robust["estimators"]) == ["HC2"]
    _close(one.robust["estimators"]["HC2"]["covariance"], both.robust["estimators"]["HC2"]["covariance"])
    with pytest.raises(DesignError, match="unknown robust covariance 'HC9'"):
        tallfit.fit(table, target="invest", features=["value", "capital"], robust="HC9")


def test_summary_caution_names_what_the_robust_errors_allow(grunfeld):
    table = grunfeld[0]
    plain = tallfit.fit(table, target="invest", features=["value", "capital"]).summary()
    assert "robust or clustered errors need a second pass" in plain
    hc = tallfit.fit(table, target="invest", features=["value", "capital"], robust="HC1").summary()
    assert "HC1 allows unequal noise but" in hc and "need a second pass" not in hc
    cl = tallfit.fit(table, target="invest", features=["value", "capital"], cluster="firm").summary()
    assert "dependent within a cluster" in cl


def test_categorical_model_robust_errors_match_statsmodels_dummies(grunfeld, monkeypatch):
    """A model with the year as a categorical (19 indicators, reference 1954, the most frequent's
    tie-break) and a second categorical (firm, clustered on too): the pass looks each row's level
    rows of the tile map up instead of multiplying indicator columns. Every HC kind and the
    firm-clustered errors equal statsmodels OLS on explicit dummies; the diagnostics equal those
    of the dense-indicator pass."""
    import tallfit.engine.pass_sums as ps

    table, _, y, firm, _ = grunfeld
    model = tallfit.fit(table, target="invest", features=["value", "capital"], categorical=["year", "firm"],
                        batch_rows=23)
    sp = second_pass(model, table, cluster=["firm"], robust="all", batch_rows=23)
    r = robust_for_model(model, sp.sandwich, sp.clusters, "all")
    d = sm.datasets.grunfeld.load_pandas().data
    cols = {"(intercept)": np.ones(len(d)), "value": d.value.to_numpy(float), "capital": d.capital.to_numpy(float)}
    for term in model.terms[3:]:
        col, level = term[:-1].split("[", 1)
        vals = d.year.astype(int).astype(str) if col == "year" else d.firm.astype(str)
        cols[term] = (vals.to_numpy() == level).astype(float)
    X = np.column_stack([cols[t] for t in model.terms])
    assert X.shape[1] == 3 + 19 + 10
    for kind in ("HC0", "HC1", "HC2", "HC3"):
        _close(r["estimators"][kind]["covariance"], sm.OLS(y, X).fit(cov_type=kind).cov_params())
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": firm}, use_t=True)
    cl = robust_for_model(model, sp.sandwich, sp.clusters, None)["estimators"]["cluster:firm"]
    _close(cl["covariance"], ref.cov_params(), rtol=1e-7)
    monkeypatch.setattr(ps.PassPlan, "__init__", _dense_plan(ps.PassPlan.__init__))
    dense = second_pass(model, table, cluster=["firm"], robust="all", batch_rows=23)
    assert dense.n_used == sp.n_used == len(d)
    np.testing.assert_allclose(dense.sandwich.gram, sp.sandwich.gram, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(dense.feature_bins.sums, sp.feature_bins.sums, rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(dense.fitted_bins.sums, sp.fitted_bins.sums, rtol=1e-10, atol=1e-9)
    np.testing.assert_array_equal(dense.heat, sp.heat)
    np.testing.assert_allclose(dense.top_leverage.values, sp.top_leverage.values, rtol=1e-10)


def _dense_plan(init):
    """PassPlan.__init__ with the level lookup turned off (blocks with dense indicator columns)."""
    def dense(self, model, *args, **kwargs):
        init(self, model, *args, **kwargs)
        if self.level_codes:
            self.level_codes, self.level_maps, self.dense = False, [], len(model.accumulator.names) - 1
            self._maps.clear()
    return dense


@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC2", "HC3"])
def test_analytic_weights_match_statsmodels_wls(kind):
    """WLS with weights 1/INCOME on ccard (Greene's textbook example, shipped by statsmodels):
    robust errors equal statsmodels WLS(...).fit(cov_type=kind), which whitens rows by √w."""
    d = sm.datasets.ccard.load_pandas().data
    feats = ["AGE", "INCOME", "INCOMESQ", "OWNRENT"]
    w = 1.0 / d.INCOME.to_numpy(float)
    table = pa.table({**{c: d[c].to_numpy(float) for c in feats + ["AVGEXP"]}, "w": w})
    model = tallfit.fit(table, "AVGEXP", feats, weights="w", robust=kind, batch_rows=16)
    ref = sm.WLS(d.AVGEXP.to_numpy(float), sm.add_constant(d[feats].to_numpy(float)), weights=w).fit(cov_type=kind)
    _close(model.robust["estimators"][kind]["std_error"], ref.bse)
