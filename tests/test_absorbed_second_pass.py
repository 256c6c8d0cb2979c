"""The second pass of a model with an absorbed key: robust and clustered errors, leverages,
Breusch–Pagan and residual summaries, against statsmodels fits with one indicator per level.

References: statsmodels OLS with explicit firm dummies on the grunfeld panel it ships (Grunfeld
1958 firm-year investment data), fit(cov_type="HC0".."HC3") and cov_type="cluster" (CRV1, its
default small-sample correction, which counts every dummy as a parameter), its hat-matrix
diagonal (OLSInfluence) and statsmodels.stats.diagnostic.het_breuschpagan on a constant and the
within-firm centred features. Two-way clustering is checked against the inclusion–exclusion
formula of Cameron, Gelbach & Miller (JBES 2011) computed densely on the dummy design.
Agreement is asked to 1e-8 relative.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallfit
from tallfit.api import diagnose
from tallfit.engine.absorbed_rows import ONE_ROW_LEVEL, UNSEEN_LEVEL
from tallfit.engine.second_pass import second_pass
from tallfit.modelfile import load_model, save_model

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.diagnostic import het_breuschpagan  # noqa: E402

RTOL = 1e-8
FEATURES = ["value", "capital"]


def _close(a, b, rtol=RTOL):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=0)


def _table(df) -> pa.Table:
    return pa.table({"invest": df.invest.to_numpy(float), "value": df.value.to_numpy(float),
                     "capital": df.capital.to_numpy(float), "firm": df.firm.astype(str).to_numpy(),
                     "year": df.year.to_numpy(np.int64)})


def _dummy_fit(df):
    """statsmodels OLS of invest on value, capital and one indicator per firm (no constant)."""
    firms = sorted(set(df.firm.astype(str)))
    D = np.column_stack([(df.firm.astype(str).to_numpy() == f).astype(float) for f in firms])
    X = np.column_stack([df.value.to_numpy(float), df.capital.to_numpy(float), D])
    return sm.OLS(df.invest.to_numpy(float), X), X


@pytest.fixture(scope="module")
def grunfeld():
    df = sm.datasets.grunfeld.load_pandas().data
    return df, _table(df)


@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC2", "HC3"])
def test_hc_errors_equal_the_dummy_fit(grunfeld, kind):
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", robust=kind, batch_rows=13)
    ols, _ = _dummy_fit(df)
    ref = ols.fit(cov_type=kind, use_t=True)
    est = model.robust["estimators"][kind]
    _close(est["std_error"], ref.bse[:2])
    _close(est["p_value"], ref.pvalues[:2])
    assert est["df"] == ref.df_resid == len(df) - 2 - 11  # n − p − G, as the plain errors


@pytest.mark.parametrize("key", ["firm", "year"])
def test_one_way_clusters_equal_the_dummy_fit(grunfeld, key):
    """Clustered by another key (year): statsmodels' CRV1 of the dummy fit, k = p + G. Clustered by
    the absorbed key itself (firm, the levels nested in the clusters): the same sandwich with G left
    out of k, i.e. statsmodels' covariance times (n − p − G)/(n − p), and a note that says so."""
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", cluster=key, batch_rows=13)
    ols, _ = _dummy_fit(df)
    groups = df[key].astype(str).factorize()[0]
    ref = ols.fit(cov_type="cluster", cov_kwds={"groups": groups}, use_t=True)
    est = model.robust["estimators"][f"cluster:{key}"]
    n, p, G = len(df), 2, 11
    scale = (n - p - G) / (n - p) if key == "firm" else 1.0
    _close(est["covariance"], ref.cov_params()[:2, :2] * scale)
    _close(est["std_error"], ref.bse[:2] * np.sqrt(scale))
    assert est["df"] == groups.max()  # G − 1
    nested_note = any("lie within the clusters" in note for note in model.robust["notes"])
    assert nested_note == (key == "firm")


def test_two_way_clusters_equal_inclusion_exclusion_on_the_dummy_design(grunfeld):
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", cluster="firm,year", batch_rows=13)
    ols, X = _dummy_fit(df)
    e = ols.fit().resid
    n, k = X.shape
    bread = np.linalg.inv(X.T @ X)

    def crv1(groups, params):
        G = groups.max() + 1
        S = np.zeros((G, k))
        np.add.at(S, groups, X * e[:, None])
        return bread @ (S.T @ S) @ bread * G / (G - 1) * (n - 1) / (n - params)

    firm = df.firm.factorize()[0]
    year = df.year.factorize()[0]
    pair = np.unique(firm * 100 + year, return_inverse=True)[1]
    # the firm levels lie within the firm clusters and within the firm × year cells: those two
    # terms leave them out of k (see the one-way test); the year term counts them, k = p + G
    dense = (crv1(firm, 2) + crv1(year, k) - crv1(pair, 2))[:2, :2]
    _close(model.robust["estimators"]["cluster:firm+year"]["covariance"], dense)


def test_leverage_breusch_pagan_and_residuals_equal_the_dummy_fit(grunfeld):
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm")
    ols, _ = _dummy_fit(df)
    ref = ols.fit()
    out = diagnose(model, table, keep=["firm"], robust="HC3")
    diag = out["diagnostics"]
    assert diag["same_data"] and out["model"].robust is not None
    # the hat matrix of the dummy fit: 1/n_g + the centred rows' leverage
    h = ref.get_influence().hat_matrix_diag
    top = diag["top_leverage"]
    _close([r["leverage"] for r in top], np.sort(h)[::-1][: len(top)])
    assert [r["row"] for r in top] == list(np.argsort(-h, kind="stable")[: len(top)])
    worst = diag["top_residuals"][0]
    i = int(np.argmax(np.abs(ref.resid)))
    assert worst["row"] == i and worst["firm"] == str(df.firm[i])
    _close(worst["residual"], ref.resid[i])
    _close(worst["fitted"], ref.fittedvalues[i])
    _close(diag["residuals"]["mae"], np.mean(np.abs(ref.resid)))
    # Breusch–Pagan (Koenker) on a constant and the within-firm centred features
    within = df[FEATURES].to_numpy(float) - df.groupby("firm")[FEATURES].transform("mean").to_numpy(float)
    lm, lm_p, f, f_p = het_breuschpagan(ref.resid, np.column_stack([np.ones(len(df)), within]))
    bp = diag["breusch_pagan"]
    _close([bp["statistic"], bp["p_value"], bp["f_statistic"], bp["f_p_value"]], [lm, lm_p, f, f_p])
    assert bp["df"] == 2
    # binned residuals per feature: every row, with the dummy fit's residuals
    sp = second_pass(model, table, robust="HC0")
    for j in range(len(FEATURES)):
        sums = sp.feature_bins.sums[j]  # (count, Σx, Σe, Σe²) per cell of the feature's grid
        assert sums[:, 0].sum() == len(df)
        _close(sums[:, 1].sum(), df[FEATURES[j]].sum())
        _close(sums[:, 3].sum(), np.sum(ref.resid**2))


def test_a_categorical_beside_the_key_equals_two_way_dummies(grunfeld):
    """Firm absorbed and year categorical: the slopes' HC1 errors of the fit with firm and year dummies."""
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", categorical=["year"], robust="HC1",
                        batch_rows=29)
    years = sorted(set(df.year))
    ols, X = _dummy_fit(df)
    Y = np.column_stack([(df.year.to_numpy() == y).astype(float) for y in years[1:]])
    ref = sm.OLS(df.invest.to_numpy(float), np.column_stack([X[:, :2], Y, X[:, 2:]])).fit(cov_type="HC1")
    assert model.terms[:2] == FEATURES and len(model.terms) == 2 + len(years) - 1
    _close(model.robust["estimators"]["HC1"]["std_error"][:2], ref.bse[:2])


def test_a_level_of_one_row_is_left_out_and_n_minus_k_kept(grunfeld):
    """A firm with one row fits exactly (leverage 1): the pass leaves it out, and HC1 / HC3 equal
    the dummy fit without it (one row and one parameter fewer: n − k unchanged)."""
    df, table = grunfeld
    extra = df.iloc[:1].copy()
    extra["firm"] = "Lone Firm"
    extra["invest"] = 99.0
    both = pd.concat([df, extra], ignore_index=True)
    model = tallfit.fit(_table(both), "invest", FEATURES, absorb="firm", robust="all")
    ols, _ = _dummy_fit(df)
    for kind in ("HC1", "HC3"):
        _close(model.robust["estimators"][kind]["std_error"], ols.fit(cov_type=kind).bse[:2])
    out = diagnose(model, _table(both))
    assert out["diagnostics"]["dropped_by_column"] == {ONE_ROW_LEVEL: 1}
    assert out["diagnostics"]["same_data"]


def test_other_data_with_a_new_level_counts_its_rows(grunfeld, tmp_path):
    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm")
    path = tmp_path / "model.json"
    save_model(model, path)
    loaded = load_model(path)
    np.testing.assert_array_equal(loaded.coding["absorbed"]["means"], model.coding["absorbed"]["means"])
    other = df.copy()
    other.loc[other.index[:20], "firm"] = "New Firm"
    out = diagnose(loaded, _table(other))
    diag = out["diagnostics"]
    assert diag["dropped_by_column"] == {UNSEEN_LEVEL: 20}
    assert diag["n_used"] == len(df) - 20 and not diag["same_data"]


def test_parts_read_apart_equal_one_stream(grunfeld, tmp_path):
    df, table = grunfeld
    for i in range(4):
        pq.write_table(table.slice(i * 55, 55), tmp_path / f"part{i}.parquet", row_group_size=20)
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm")
    one = second_pass(model, table, cluster=["year"], robust="all", batch_rows=17)
    parts = second_pass(model, str(tmp_path), cluster=["year"], robust="all", batch_rows=17, workers=2)
    assert parts.n_used == one.n_used == len(df)
    np.testing.assert_allclose(parts.sandwich.gram, one.sandwich.gram, rtol=1e-12)
    np.testing.assert_allclose(parts.clusters[0].S[:20], one.clusters[0].S[:20], rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(parts.top_leverage.values, one.top_leverage.values, rtol=1e-13)


def test_within_level_vif_and_centred_r_squared(grunfeld):
    """R² over the grand mean (as the dummy fit reports it, its dummies spanning the constant) and
    VIFs of the within-firm centred features (statsmodels variance_inflation_factor on them,
    with a constant)."""
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    df, table = grunfeld
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm")
    ols, _ = _dummy_fit(df)
    doc = model.to_dict()
    assert doc["r_squared_kind"] == "centered"
    assert doc["absorbed"]["column"] == "firm" and doc["absorbed"]["levels"] == 11
    within = ols.fit()
    # R² within firms: the dummy fit's residuals against invest centred on each firm's mean
    centred = df.invest - df.groupby("firm").invest.transform("mean")
    _close(doc["absorbed"]["r_squared_within"], 1 - np.sum(within.resid**2) / np.sum(centred**2))
    _close(model.inference.r_squared, ols.fit().rsquared)
    within = df[FEATURES].to_numpy(float) - df.groupby("firm")[FEATURES].transform("mean").to_numpy(float)
    Xc = np.column_stack([np.ones(len(df)), within])
    col = model.collinearity()
    assert col.centred
    _close(col.vif, [variance_inflation_factor(Xc, j) for j in (1, 2)])


@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC3", "cluster"])
def test_analytic_weights_equal_wls_with_dummies(grunfeld, kind):
    """Rows weighted by 1/√value (analytic): robust and firm-clustered errors equal statsmodels
    WLS with firm dummies (its whitened rows: leverage wᵢ/W_g + ‖zᵢ‖²)."""
    df, table = grunfeld
    w = 1.0 / np.sqrt(df.value.to_numpy(float))
    table = table.append_column("w", pa.array(w))
    opts = {"cluster": "firm"} if kind == "cluster" else {"robust": kind}
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", weights="w", batch_rows=23, **opts)
    _, X = _dummy_fit(df)
    wls = sm.WLS(df.invest.to_numpy(float), X, weights=w)
    scale = 1.0
    if kind == "cluster":  # by the absorbed key: G left out of the cluster factor's k (see above)
        ref = wls.fit(cov_type="cluster", cov_kwds={"groups": df.firm.factorize()[0]})
        est = model.robust["estimators"]["cluster:firm"]
        scale = (len(df) - 2 - 11) / (len(df) - 2)
    else:
        ref = wls.fit(cov_type=kind)
        est = model.robust["estimators"][kind]
    _close(model.inference.estimate, ref.params[:2])
    _close(est["std_error"], ref.bse[:2] * np.sqrt(scale))


def test_weighted_absorbed_report_bins_the_data_units(grunfeld):
    """The residual checks of a weighted model bin the features in their own units: every row,
    with Σx per feature equal to the data's."""
    df, table = grunfeld
    table = table.append_column("w", pa.array(np.linspace(0.5, 2.0, len(df))))
    model = tallfit.fit(table, "invest", FEATURES, absorb="firm", weights="w")
    sp = second_pass(model, table, robust="HC1")
    for j, f in enumerate(FEATURES):
        sums = sp.feature_bins.sums[j]
        assert sums[:, 0].sum() == len(df)
        _close(sums[:, 1].sum(), df[f].sum())


def test_rows_without_a_key_value_are_dropped_in_the_pass_as_in_the_fit(grunfeld, tmp_path):
    """Null keys: the fit drops those rows (counted under the key) and so does the pass, which
    then reads the same rows (same_data) and gives the robust errors of the dummy fit without them."""
    df, table = grunfeld
    firm = table.column("firm").to_pylist()
    blank = [3, 50, 51, 140]
    for i in blank:
        firm[i] = None
    table = table.set_column(table.schema.get_field_index("firm"), "firm", pa.array(firm))
    pq.write_table(table, tmp_path / "g.parquet", row_group_size=60)  # parts read on every core
    model = tallfit.fit(str(tmp_path / "g.parquet"), "invest", FEATURES, absorb="firm")
    out = diagnose(model, str(tmp_path / "g.parquet"), robust="HC1")
    assert out["diagnostics"]["dropped_by_column"] == {"firm": len(blank)}
    assert out["diagnostics"]["same_data"]
    kept = df.drop(index=df.index[blank])
    ols, _ = _dummy_fit(kept)
    _close(out["model"].robust["estimators"]["HC1"]["std_error"], ols.fit(cov_type="HC1").bse[:2])
