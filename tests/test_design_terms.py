"""Categorical coding, weights, derived terms, filters and missing-value policies.

References: statsmodels OLS/WLS (statsmodels.regression.linear_model) with explicit dummy
columns, on data sets statsmodels ships (grunfeld firm-year panel: Grunfeld 1958, as in
Greene, Econometric Analysis; ccard: Greene's credit-card expenditure data, whose WLS with
weights 1/INCOME is a textbook example). Invented data only where a property is checked
(levels first seen in the last batch, recoding equals a direct fit)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallfit
from tallfit.errors import ColumnNotFoundError, DataSourceError, DesignError

sm = pytest.importorskip("statsmodels.api")
RTOL = 1e-8


def _grunfeld():
    df = sm.datasets.grunfeld.load_pandas().data
    return df, pa.table({"invest": df.invest.to_numpy(), "value": df.value.to_numpy(),
                         "capital": df.capital.to_numpy(), "firm": df.firm.astype(str).to_numpy(),
                         "year": df.year.to_numpy()})


def _dummies(labels, levels):
    return np.column_stack([(labels == lv).astype(float) for lv in levels])


def test_categorical_matches_explicit_dummies_with_chosen_reference():
    df, table = _grunfeld()
    ref = "US Steel"
    model = tallfit.fit(table, "invest", ["value", "capital"], categorical=["firm"],
                        reference={"firm": ref}, batch_rows=17)
    others = sorted(set(df.firm) - {ref})
    X = np.column_stack([np.ones(len(df)), df.value, df.capital, _dummies(df.firm.to_numpy(), others)])
    res = sm.OLS(df.invest.to_numpy(), X).fit()
    assert model.terms == ["(intercept)", "value", "capital"] + [f"firm[{f}]" for f in others]
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=RTOL)
    np.testing.assert_allclose(model.inference.std_error, res.bse, rtol=RTOL)
    np.testing.assert_allclose(model.inference.r_squared, res.rsquared, rtol=RTOL)
    np.testing.assert_allclose(model.inference.f_statistic, res.fvalue, rtol=RTOL)
    levels = model.to_dict()["levels"]["firm"]
    assert levels["reference"] == ref and sum(levels["counts"].values()) == 220


def test_default_reference_is_most_frequent_and_year_as_integer_categorical():
    df, table = _grunfeld()
    model = tallfit.fit(table.set_column(4, "year", pa.array(df.year.astype(int))), "invest", ["value"],
                        categorical=["year"])
    # every year has 10 rows: ties broken by level name, so the reference is the last name
    years = sorted(str(y) for y in df.year.astype(int).unique())
    assert model.coding["columns"]["year"]["reference"] == years[-1]
    assert len(model.terms) == 2 + len(years) - 1


def test_level_first_seen_in_last_batch():
    rng = np.random.default_rng(5)
    n = 400
    cls = np.array(["compute-a"] * 200 + ["storage-b"] * 190 + ["gpu-c"] * 10)
    x = rng.normal(size=n)
    y = 1 + 2 * x + np.select([cls == "storage-b", cls == "gpu-c"], [3.0, -4.0], 0.0) + rng.normal(size=n)
    table = pa.table({"cpu": x, "cls": cls, "power": y})
    model = tallfit.fit(table, "power", ["cpu"], categorical=["cls"], batch_rows=10,
                        reference={"cls": "compute-a"})
    X = np.column_stack([np.ones(n), x, _dummies(cls, ["gpu-c", "storage-b"])])
    res = sm.OLS(y, X).fit()
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=1e-10)
    np.testing.assert_allclose(model.inference.std_error, res.bse, rtol=1e-10)


def test_rare_levels_merge_into_other_equal_a_direct_fit():
    rng = np.random.default_rng(8)
    n = 600
    racks = rng.choice(["r01", "r02", "r03", "r04", "r05"], size=n, p=[0.5, 0.3, 0.15, 0.03, 0.02])
    x = rng.normal(size=n)
    y = 5 + x + (racks == "r02") * 2.0 + rng.normal(size=n)
    table = pa.table({"x": x, "rack": racks, "y": y})
    counts = {r: int((racks == r).sum()) for r in set(racks)}
    model = tallfit.fit(table, "y", ["x"], categorical=["rack"], min_level_count=40, batch_rows=50)
    rare = sorted(r for r, c in counts.items() if c < 40)
    assert model.coding["columns"]["rack"]["merged"] == rare
    kept = sorted(r for r, c in counts.items() if c >= 40 and r != "r01")
    other = np.isin(racks, rare).astype(float)
    X = np.column_stack([np.ones(n), x, _dummies(racks, kept), other])
    res = sm.OLS(y, X).fit()
    assert model.terms[-1] == "rack[(other)]"
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=1e-9)
    np.testing.assert_allclose(model.inference.std_error, res.bse, rtol=1e-9)


def test_unseen_levels_at_prediction_under_each_policy():
    rng = np.random.default_rng(2)
    n = 300
    reg = rng.choice(["north-1", "west-2", "east-3"], size=n)
    x = rng.normal(size=n)
    y = x + (reg == "west-2") * 1.5 + rng.normal(size=n)
    model = tallfit.fit(pa.table({"x": x, "region": reg, "y": y}), "y", ["x"], categorical=["region"],
                        reference={"region": "north-1"})
    new = pa.table({"x": [0.5, 0.5, 0.5], "region": ["west-2", "south-9", "north-1"]})
    with pytest.raises(DesignError, match="south-9"):
        tallfit.predict(model, new)
    pred = tallfit.predict(model, new, unseen="reference")["prediction"].to_numpy()
    assert pred[1] == pytest.approx(pred[2])  # scored as the reference level
    b = model.coef
    assert pred[0] == pytest.approx(b["(intercept)"] + 0.5 * b["x"] + b["region[west-2]"])


def test_categorical_with_one_level_is_an_error():
    table = pa.table({"x": np.arange(10.0), "cls": ["compute-a"] * 10, "y": np.arange(10.0) ** 1.5})
    with pytest.raises(DesignError, match="only one level"):
        tallfit.fit(table, "y", ["x"], categorical=["cls"])


def test_weighted_least_squares_matches_statsmodels_wls():
    df = sm.datasets.ccard.load_pandas().data
    feats = ["AGE", "INCOME", "INCOMESQ", "OWNRENT"]
    w = 1.0 / df.INCOME.to_numpy()
    table = pa.table({**{c: df[c].to_numpy() for c in feats}, "AVGEXP": df.AVGEXP.to_numpy(), "w": w})
    model = tallfit.fit(table, "AVGEXP", feats, weights="w", batch_rows=9)
    res = sm.WLS(df.AVGEXP.to_numpy(), sm.add_constant(df[feats].to_numpy()), weights=w).fit()
    inf = model.inference
    for ours, theirs in [(inf.estimate, res.params), (inf.std_error, res.bse), (inf.r_squared, res.rsquared),
                         (inf.adj_r_squared, res.rsquared_adj), (inf.f_statistic, res.fvalue),
                         (inf.log_likelihood, res.llf), (inf.aic, res.aic), (inf.bic, res.bic)]:
        np.testing.assert_allclose(ours, theirs, rtol=RTOL)


def test_frequency_weights_equal_repeated_rows():
    df = sm.datasets.stackloss.load_pandas().data
    feats = ["AIRFLOW", "WATERTEMP", "ACIDCONC"]
    reps = np.arange(len(df)) % 3 + 1
    table = pa.table({**{c: df[c].to_numpy() for c in feats}, "y": df.STACKLOSS.to_numpy(), "n": reps.astype(float)})
    model = tallfit.fit(table, "y", feats, weights="n", weight_kind="frequency")
    X = np.repeat(sm.add_constant(df[feats].to_numpy()), reps, axis=0)
    res = sm.OLS(np.repeat(df.STACKLOSS.to_numpy(), reps), X).fit()
    inf = model.inference
    assert inf.df_resid == res.df_resid
    for ours, theirs in [(inf.estimate, res.params), (inf.std_error, res.bse), (inf.log_likelihood, res.llf),
                         (inf.bic, res.bic), (inf.r_squared, res.rsquared)]:
        np.testing.assert_allclose(ours, theirs, rtol=RTOL)


def test_zero_weights_do_not_count_and_negative_weights_fail():
    rng = np.random.default_rng(1)
    x = rng.normal(size=50)
    y = x + rng.normal(size=50)
    w = np.ones(50)
    w[:5] = 0.0
    model = tallfit.fit(pa.table({"x": x, "y": y, "w": w}), "y", ["x"], weights="w")
    plain = tallfit.fit(pa.table({"x": x[5:], "y": y[5:]}), "y", ["x"])
    assert model.inference.df_resid == plain.inference.df_resid
    np.testing.assert_allclose(model.inference.std_error, plain.inference.std_error, rtol=1e-12)
    w[7] = -1.0
    with pytest.raises(DataSourceError, match="weight column 'w'.*rows 0-49"):
        tallfit.fit(pa.table({"x": x, "y": y, "w": w}), "y", ["x"], weights="w")


def test_derived_terms_equal_precomputed_columns_and_where_equals_prefiltered():
    rng = np.random.default_rng(4)
    n = 500
    cpu, iops = rng.uniform(0, 1, n), rng.uniform(10, 1000, n)
    temp = rng.normal(24, 3, n)
    region = rng.choice(["north-1", "west-2"], n)
    y = 100 + 50 * cpu + 3 * np.log(iops + 1) + 2 * cpu * temp + rng.normal(size=n)
    table = pa.table({"cpu": cpu, "iops": iops, "temp": temp, "region": region, "y": y})
    model = tallfit.fit(table, "y", ["cpu", "temp"], derive=["log_iops = ln(iops + 1)"],
                        interactions=["cpu", "temp"], polynomials={"cpu": 2},
                        where="region = 'north-1' AND cpu > 0.05", batch_rows=64)
    sel = (region == "north-1") & (cpu > 0.05)
    pre = pa.table({"cpu": cpu[sel], "temp": temp[sel], "log_iops": np.log(iops[sel] + 1),
                    "cpu_x_temp": cpu[sel] * temp[sel], "cpu_pow2": cpu[sel] ** 2, "y": y[sel]})
    direct = tallfit.fit(pre, "y", ["cpu", "temp", "log_iops", "cpu_x_temp", "cpu_pow2"])
    assert model.terms == direct.terms
    np.testing.assert_allclose(model.inference.estimate, direct.inference.estimate, rtol=1e-10)
    assert model.dropped_rows["by_column"]["(where filter)"] == int((~sel).sum())
    pred = tallfit.predict(model, table)["prediction"].to_numpy()  # derived terms recomputed
    X = np.column_stack([np.ones(n), cpu, temp, np.log(iops + 1), cpu * temp, cpu**2])
    np.testing.assert_allclose(pred, X @ model.inference.estimate, rtol=1e-10)


@pytest.mark.parametrize(
    "kwargs,error,match",
    [
        ({"derive": ["bad = ln(cpu +"]}, DesignError, "not a valid SQL expression"),
        ({"derive": ["bad = ln(cpuu + 1)"]}, ColumnNotFoundError, "cpuu.*did you mean 'cpu'"),
        ({"where": "cpu >>> 3"}, DesignError, "--where"),
        ({"derive": ["no equals sign"]}, DesignError, "NAME = EXPRESSION"),
    ],
)
def test_bad_expressions_point_at_the_expression(kwargs, error, match):
    table = pa.table({"cpu": [0.1, 0.2, 0.3, 0.4], "y": [1.0, 2.0, 2.5, 4.0]})
    with pytest.raises(error, match=match):
        tallfit.fit(table, "y", ["cpu"], **kwargs)


def test_missing_policies():
    x = np.array([1.0, 2.0, np.nan, 4.0, 5.0, 6.0, np.inf, 8.0])
    z = np.array([0.5, 0.1, 0.7, 0.2, 0.9, 0.4, 0.3, 0.8])
    y = np.array([2.0, 4.1, 5.0, 8.2, 9.9, 12.1, 13.0, 16.2])
    t = pa.table({"x": x, "z": z, "y": y})
    filled = tallfit.fit(t, "y", ["x", "z"], missing={"x": "fill:3"})
    direct = tallfit.fit(pa.table({"x": np.where(np.isfinite(x), x, 3.0), "z": z, "y": y}), "y", ["x", "z"])
    np.testing.assert_allclose(filled.inference.estimate, direct.inference.estimate, rtol=1e-12)
    assert filled.accumulator.filled == {"x": 2}
    ind = tallfit.fit(t, "y", ["x", "z"], missing={"x": "indicator:0"})
    assert ind.terms == ["(intercept)", "x", "z", "x[missing]"]
    X = np.column_stack([np.ones(8), np.where(np.isfinite(x), x, 0.0), z, (~np.isfinite(x)).astype(float)])
    np.testing.assert_allclose(ind.inference.estimate, np.linalg.lstsq(X, y, rcond=None)[0], rtol=1e-9)
    with pytest.raises(DataSourceError, match="column 'x'.*rows 0-7"):
        tallfit.fit(t, "y", ["x", "z"], missing={"x": "fail"})


def test_absorbed_key_equals_explicit_dummies():
    """Within estimator = fit with one indicator per firm (Frisch–Waugh–Lovell), statsmodels OLS."""
    df, table = _grunfeld()
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm", batch_rows=13)
    firms = sorted(set(df.firm))
    X = np.column_stack([df.value, df.capital, _dummies(df.firm.to_numpy(), firms)])
    res = sm.OLS(df.invest.to_numpy(), X).fit()
    inf = model.inference
    assert model.terms == ["value", "capital"]
    np.testing.assert_allclose(inf.estimate, res.params[:2], rtol=1e-9)
    np.testing.assert_allclose(inf.std_error, res.bse[:2], rtol=1e-9)
    assert inf.df_resid == res.df_resid
    np.testing.assert_allclose(inf.r_squared, res.rsquared, rtol=1e-9)
    np.testing.assert_allclose(inf.log_likelihood, res.llf, rtol=1e-10)
    np.testing.assert_allclose(inf.aic, res.aic, rtol=1e-10)
    effects = model.coding["absorbed"]["effects"]
    np.testing.assert_allclose([effects[f] for f in firms], res.params[2:], rtol=1e-8)
    pred = tallfit.predict(model, table)["prediction"].to_numpy()
    np.testing.assert_allclose(pred, res.fittedvalues, rtol=1e-9)


def test_absorbed_model_intervals_equal_the_dummy_fit_and_unseen_levels_get_none(tmp_path):
    """Mean-response and new-row intervals of an absorbed model on shifted rows equal statsmodels'
    get_prediction(...).summary_frame of the fit with firm dummies (Var ŷ = σ²(1/n_g +
    ‖R11⁻ᵀ(x − x̄_g)‖²)); rows of a firm the model never saw get a prediction and no interval."""
    df, table = _grunfeld()
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm")
    firms = sorted(set(df.firm))
    new = df.copy()
    new["value"] = new["value"] * 1.3 + 50.0
    X = np.column_stack([new.value, new.capital, _dummies(new.firm.to_numpy(), firms)])
    ref = sm.OLS(df.invest.to_numpy(), np.column_stack([df.value, df.capital, _dummies(df.firm.to_numpy(), firms)]))
    frame = ref.fit().get_prediction(X).summary_frame(alpha=0.05)
    new_table = table.set_column(1, "value", pa.array(new.value.to_numpy()))
    out = tallfit.predict(model, new_table, intervals=True)
    for ours, theirs in (("ci_low", "mean_ci_lower"), ("ci_high", "mean_ci_upper"),
                         ("pi_low", "obs_ci_lower"), ("pi_high", "obs_ci_upper")):
        np.testing.assert_allclose(out[ours].to_numpy(), frame[theirs].to_numpy(), rtol=1e-9)
    firm = table.column("firm").to_pylist()
    firm[:3] = ["New Firm"] * 3
    unseen = table.set_column(table.schema.get_field_index("firm"), "firm", pa.array(firm))
    report = tallfit.predict(model, unseen, intervals=True, unseen="reference", out=tmp_path / "p.parquet")
    assert report.rows_without_interval == 3 and report.rows_unseen_levels == 3
    assert any("got no interval" in w for w in report.warnings())
    got = pq.read_table(tmp_path / "p.parquet")
    assert np.isnan(got["ci_low"].to_numpy()[:3]).all() and np.isfinite(got["prediction"].to_numpy()[:3]).all()
    same = tallfit.predict(model, table, intervals=True)
    np.testing.assert_array_equal(got["pi_high"].to_numpy()[3:], same["pi_high"].to_numpy()[3:])


def test_rows_without_a_key_value_are_dropped_and_counted():
    """A null absorbed key belongs to no level: the row is dropped (counted under the key), and
    the fit equals statsmodels OLS with firm dummies on the other rows."""
    df, table = _grunfeld()
    firm = table.column("firm").to_pylist()
    blank = [i for i in range(len(firm)) if i % 37 == 5]
    for i in blank:
        firm[i] = None
    table = table.set_column(table.schema.get_field_index("firm"), "firm", pa.array(firm))
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm", batch_rows=17)
    kept = df.drop(index=df.index[blank])
    firms = sorted(set(kept.firm))
    X = np.column_stack([kept.value, kept.capital, _dummies(kept.firm.to_numpy(), firms)])
    res = sm.OLS(kept.invest.to_numpy(), X).fit()
    assert model.accumulator.dropped_by_column == {"firm": len(blank)}
    assert model.inference.df_resid == res.df_resid
    np.testing.assert_allclose(model.inference.estimate, res.params[:2], rtol=1e-9)
    np.testing.assert_allclose(model.inference.std_error, res.bse[:2], rtol=1e-9)


def test_an_integer_key_and_categorical_equal_their_labels():
    """An integer firm code absorbed, with the integer year as a categorical, gives the fit of the
    same columns as strings (statsmodels' Grunfeld panel); the level names are the codes."""
    df, table = _grunfeld()
    firms = sorted(set(df.firm))
    code = np.array([100 + firms.index(f) for f in df.firm], dtype=np.int64)
    ints = table.set_column(table.schema.get_field_index("firm"), "firm", pa.array(code))
    strings = ints.set_column(ints.schema.get_field_index("firm"), "firm", pa.array(code.astype(str)))
    strings = strings.set_column(strings.schema.get_field_index("year"), "year",
                                 pa.array(df.year.to_numpy().astype(int).astype(str)))
    a = tallfit.fit(ints, "invest", ["value", "capital"], categorical=["year"], absorb="firm", batch_rows=13)
    b = tallfit.fit(strings, "invest", ["value", "capital"], categorical=["year"], absorb="firm", batch_rows=13)
    assert a.terms == b.terms and "year[1950]" in a.terms
    np.testing.assert_allclose(a.inference.estimate, b.inference.estimate, rtol=1e-12)
    np.testing.assert_allclose(a.inference.std_error, b.inference.std_error, rtol=1e-12)
    assert a.inference.df_resid == b.inference.df_resid
    ea, eb = a.coding["absorbed"]["effects"], b.coding["absorbed"]["effects"]
    assert sorted(ea) == sorted(eb) == [str(100 + i) for i in range(len(firms))]
    np.testing.assert_allclose([ea[k] for k in sorted(ea)], [eb[k] for k in sorted(eb)], rtol=1e-10)
    np.testing.assert_allclose(tallfit.predict(a, ints)["prediction"].to_numpy(),
                               tallfit.predict(b, strings)["prediction"].to_numpy(), rtol=1e-12)


def test_absorb_with_a_level_seen_late_and_a_categorical(tmp_path):
    rng = np.random.default_rng(11)
    n = 900
    host = np.concatenate([rng.choice([f"h{i:03d}" for i in range(40)], n - 30), ["h999"] * 30])
    cls = rng.choice(["compute-a", "storage-b"], n)
    x = rng.normal(size=n)
    y = 2 * x + (cls == "storage-b") * 1.0 + np.array([hash(h) % 7 for h in host]) + rng.normal(size=n)
    table = pa.table({"x": x, "host": host, "cls": cls, "y": y})
    model = tallfit.fit(table, "y", ["x"], categorical=["cls"], absorb="host", batch_rows=100,
                        reference={"cls": "compute-a"})
    hosts = sorted(set(host))
    X = np.column_stack([x, (cls == "storage-b").astype(float), _dummies(host, hosts)])
    res = sm.OLS(y, X).fit()
    np.testing.assert_allclose(model.inference.estimate, res.params[:2], rtol=1e-9)
    np.testing.assert_allclose(model.inference.std_error, res.bse[:2], rtol=1e-9)
    with pytest.raises(DesignError, match="'host' has level 'h-new'.*never saw"):
        tallfit.predict(model, pa.table({"x": [0.0], "host": ["h-new"], "cls": ["compute-a"]}))
    # rows find their host's effect whatever the key's form (plain strings, an Arrow dictionary)
    fitted = res.fittedvalues
    for keys in (pa.array(host), pa.array(host).dictionary_encode()):
        pred = tallfit.predict(model, table.set_column(1, "host", keys), batch_rows=128)["prediction"].to_numpy()
        np.testing.assert_allclose(pred, fitted, rtol=1e-9)
    # unseen hosts (and a null one) take the mean effect when allowed, and are counted
    new = pa.table({"x": [0.0, 0.0, 0.0, 0.0], "host": ["h-new", host[0], None, "h-new"],
                    "cls": ["compute-a"] * 4})
    report = tallfit.predict(model, new, unseen="reference", out=tmp_path / "scored.parquet")
    assert report.rows_unseen_levels == 3
    pred = pq.read_table(tmp_path / "scored.parquet")["prediction"].to_numpy()
    mean = model.coding["absorbed"]["mean_effect"]
    effect = model.coding["absorbed"]["effects"][host[0]]
    np.testing.assert_allclose(pred - pred[0], [0.0, effect - mean, 0.0, 0.0], atol=1e-9)


def test_where_skips_row_groups_and_partitions_without_changing_the_answer(tmp_path):
    """Pushdown is an optimisation only: the fit equals the one on pre-filtered rows."""
    from tallfit.inputs import as_source

    rng = np.random.default_rng(9)
    n = 4000
    cpu = np.sort(rng.uniform(0, 1, n))  # sorted, so row groups have narrow cpu ranges
    y = 50 + 100 * cpu + rng.normal(size=n)
    for day in ("2026-11-01", "2026-11-02"):
        d = tmp_path / f"day={day}"
        d.mkdir()
        pq.write_table(pa.table({"cpu": cpu, "y": y + (day == "2026-11-02")}), d / "part.parquet", row_group_size=500)
    src = as_source(str(tmp_path))
    model = tallfit.fit(src, "y", ["cpu"], where="cpu > 0.6 AND day = '2026-11-02'")
    assert src.pruned_files == 1 and src.pruned_rows >= 2000
    sel = cpu > 0.6
    direct = tallfit.fit(pa.table({"cpu": cpu[sel], "y": y[sel] + 1}), "y", ["cpu"])
    np.testing.assert_allclose(model.inference.estimate, direct.inference.estimate, rtol=1e-10)
    assert model.inference.n_used == int(sel.sum())


def test_levels_merged_by_name_equal_a_direct_fit():
    rng = np.random.default_rng(12)
    n = 500
    region = rng.choice(["north-1", "north-2", "west-2", "east-3"], n)
    x = rng.normal(size=n)
    y = x + (region == "west-2") * 2.0 + np.isin(region, ["north-1", "north-2"]) * 1.0 + rng.normal(size=n)
    table = pa.table({"x": x, "region": region, "y": y})
    model = tallfit.fit(table, "y", ["x"], categorical=["region"], reference={"region": "east-3"},
                        merge_levels={"region": {"north": ["north-1", "north-2"]}}, batch_rows=60)
    assert model.terms == ["(intercept)", "x", "region[north]", "region[west-2]"]
    X = np.column_stack([np.ones(n), x, np.isin(region, ["north-1", "north-2"]), region == "west-2"]).astype(float)
    res = sm.OLS(y, X).fit()
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=1e-10)
    np.testing.assert_allclose(model.inference.std_error, res.bse, rtol=1e-10)
    pred = tallfit.predict(model, pa.table({"x": [0.0, 0.0], "region": ["north-2", "north-1"]}))["prediction"]
    assert pred[0].as_py() == pytest.approx(pred[1].as_py())
    with pytest.raises(DesignError, match="no used rows"):
        tallfit.fit(table, "y", ["x"], categorical=["region"], merge_levels={"region": {"n": ["south-9"]}})


def test_scoring_by_level_lookup_equals_dense_indicators():
    """The scorer adds β (and, for intervals, R11⁻¹'s rows) of each row's level by lookup instead
    of building indicator columns. Predictions and 90 % intervals must equal the direct dense
    computation, xᵀβ and t·√(xᵀ V x) (V the model's covariance; + s² for a new row), with x the
    explicit 0/1 columns: rare levels merged into "other", an unseen level scored as "other", a
    null level and a missing feature (null predictions), two categoricals. Data invented
    (property test)."""
    from scipy import stats

    rng = np.random.default_rng(21)
    n = 2_000
    rack = rng.choice([f"r{i:02d}" for i in range(12)], n, p=[0.2, 0.2, 0.15, 0.15, 0.1, 0.1] + [0.1 / 6] * 6)
    cls = rng.choice(["compute", "storage", "edge"], n)
    x = rng.normal(size=n)
    y = 1.0 + 2.0 * x + (cls == "edge") * 0.7 + np.char.count(rack.astype(str), "3") * 0.4 + rng.normal(size=n)
    model = tallfit.fit(pa.table({"x": x, "rack": rack, "cls": cls, "y": y}), "y", ["x"],
                        categorical=["rack", "cls"], min_level_count=60, batch_rows=300)
    coding = model.coding["columns"]
    assert coding["rack"].get("other_column") is not None
    new_x = [0.3, None, -1.0, 0.5, 2.0] * 40
    new_rack = ["r00", "r07", None, "r99", "r11"] * 40
    new_cls = ["edge", "compute", "storage", "storage", "edge"] * 40
    new = pa.table({"x": pa.array(new_x), "rack": pa.array(new_rack), "cls": pa.array(new_cls)})
    got = tallfit.predict(model, new, unseen="other", intervals=True, level=0.9, batch_rows=64)
    plain = tallfit.predict(model, new, unseen="other", batch_rows=64)["prediction"]
    # the dense rows, built here from the model's coding
    def column_of(col, level):
        c = coding[col]
        if level in c["column_of"]:
            return c["column_of"][level]
        return c["other_column"] if c.get("other_column") is not None else -1
    rows = []
    for xv, r, k in zip(new_x, new_rack, new_cls):
        vals = {"(intercept)": 1.0, "x": xv if xv is not None else np.nan}
        for col, level in (("rack", r), ("cls", k)):
            j = column_of(col, level) if level is not None else -1
            for i, name in enumerate(coding[col]["columns"]):
                vals[f"{col}[{name}]"] = np.nan if level is None else float(i == j)
        rows.append([vals[t] for t in model.terms])
    X = np.array(rows)
    inf = model.inference
    pred = X @ inf.estimate
    se = np.sqrt(np.einsum("ij,jk,ik->i", X, inf.cov, X))
    q = stats.t.ppf(0.95, inf.df_resid)
    a = got["prediction"].to_numpy(zero_copy_only=False)
    ok = ~np.isnan(pred)
    assert ok.sum() == 120 and np.array_equal(np.isnan(a), ~ok)
    np.testing.assert_allclose(a[ok], pred[ok], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(plain.to_numpy(zero_copy_only=False)[ok], pred[ok], rtol=1e-12, atol=1e-12)
    for name, want in (("ci_low", pred - q * se), ("ci_high", pred + q * se),
                       ("pi_low", pred - q * np.sqrt(inf.residual_std**2 + se**2)),
                       ("pi_high", pred + q * np.sqrt(inf.residual_std**2 + se**2))):
        np.testing.assert_allclose(got[name].to_numpy(zero_copy_only=False)[ok], want[ok], rtol=1e-10, err_msg=name)
