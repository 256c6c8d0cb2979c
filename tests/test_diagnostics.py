"""Streamed residual diagnostics against independent references.

* Breusch–Pagan (Koenker form) against statsmodels.stats.diagnostic.het_breuschpagan (robust=True)
  on the fair data set statsmodels ships (Fair 1978).
* Leverages against statsmodels' OLSInfluence.hat_matrix_diag (stackloss, Brownlee 1965).
* Binned summaries, MAE, quantiles and the largest residuals against direct numpy computations
  over the same rows (invented data: these are property checks of the streaming).
* Curvature flags: a known quadratic is flagged and a straight line is not, across seeds (a
  property test on the flag rates).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.diagnostics.assemble import build_diagnostics
from tallfit.diagnostics.bins import tail_points
from tallfit.diagnostics.kernels import (
    grid_bin_sums, grid_bin_sums_reference, grid_index, grid_index_reference,
)
from tallfit.engine.second_pass import second_pass

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.diagnostic import het_breuschpagan  # noqa: E402

FAIR = ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]


def test_breusch_pagan_matches_statsmodels():
    d = sm.datasets.fair.load_pandas().data
    table = pa.table({c: d[c].to_numpy(float) for c in FAIR + ["affairs"]})
    model = tallfit.fit(table, target="affairs", features=FAIR, batch_rows=1000)
    sp = second_pass(model, table, diagnostics=False, batch_rows=777)
    X = sm.add_constant(d[FAIR].to_numpy(float))
    resid = sm.OLS(d["affairs"].to_numpy(float), X).fit().resid
    lm, lm_p, f, f_p = het_breuschpagan(resid, X, robust=True)
    bp = sp.breusch_pagan.result()
    np.testing.assert_allclose([bp["statistic"], bp["p_value"], bp["f_statistic"], bp["f_p_value"]],
                               [lm, lm_p, f, f_p], rtol=1e-8)
    assert bp["df"] == X.shape[1] - 1
    # statsmodels refuses the test without a constant column, and so do we
    bare = tallfit.fit(table, target="affairs", features=FAIR, intercept=False)
    assert second_pass(bare, table, diagnostics=False).breusch_pagan.result() is None


def _line_data(seed: int, n: int, quadratic: float, noise: float = 1.0) -> pa.Table:
    rng = np.random.default_rng(seed)
    load = rng.uniform(0, 1, n)
    temp = rng.normal(24, 3, n)
    y = 100 + 50 * load + 2 * temp + quadratic * (temp - 24) ** 2 + rng.normal(0, noise, n)
    return pa.table({"load": load, "temp": temp, "power": y, "host": rng.integers(0, 50, n)})


def test_binned_summaries_equal_direct_computation():
    t = _line_data(1, 3000, quadratic=0.1)
    model = tallfit.fit(t, target="power", features=["load", "temp"])
    diag = build_diagnostics(model, second_pass(model, t, batch_rows=97), bins=12)
    x_all = {"load": t["load"].to_numpy(), "temp": t["temp"].to_numpy()}
    X = np.column_stack([np.ones(3000), x_all["load"], x_all["temp"]])
    e = t["power"].to_numpy() - X @ model.inference.estimate
    for f in diag["features"]:
        b = f["bins"]
        x = x_all[f["name"]]
        assert sum(b["count"]) == 3000 and len(b["count"]) >= 10
        for k in range(len(b["count"])):
            last = k == len(b["count"]) - 1
            inside = (x >= b["x_low"][k]) & ((x <= b["x_high"][k]) if last else (x < b["x_high"][k]))
            assert inside.sum() == b["count"][k]
            np.testing.assert_allclose(b["x_mean"][k], x[inside].mean(), rtol=1e-12)
            np.testing.assert_allclose(b["resid_mean"][k], e[inside].mean(), rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(b["resid_sd"][k], e[inside].std(ddof=1), rtol=1e-9)
            np.testing.assert_allclose(f["partial_residual"][k], f["coef"] * x[inside].mean() + e[inside].mean(),
                                       rtol=1e-10)


def test_binned_summaries_do_not_depend_on_batch_size():
    t = _line_data(2, 2000, quadratic=0.0)
    model = tallfit.fit(t, target="power", features=["load", "temp"])
    a = build_diagnostics(model, second_pass(model, t, batch_rows=13))
    b = build_diagnostics(model, second_pass(model, t, batch_rows=2000))
    for fa, fb in zip(a["features"], b["features"]):
        assert fa["bins"]["count"] == fb["bins"]["count"]
        np.testing.assert_allclose(fa["bins"]["resid_mean"], fb["bins"]["resid_mean"], rtol=1e-9, atol=1e-12)


def test_residual_sketch_and_largest_rows():
    t = _line_data(3, 5000, quadratic=0.0, noise=2.0)
    model = tallfit.fit(t, target="power", features=["load", "temp"])
    sp = second_pass(model, t, keep=["host"], top_k=5, batch_rows=333)
    diag = build_diagnostics(model, sp)
    X = np.column_stack([np.ones(5000), t["load"].to_numpy(), t["temp"].to_numpy()])
    e = t["power"].to_numpy() - X @ model.inference.estimate
    res = diag["residuals"]
    np.testing.assert_allclose(res["mae"], np.abs(e).mean(), rtol=1e-12)
    np.testing.assert_allclose(res["rmse"], np.sqrt((e * e).mean()), rtol=1e-12)
    for q, v in res["quantiles"].items():
        # numpy's quantile (Hyndman & Fan type 7) and ours differ by at most the sketch's cell
        # width plus the gap between neighbouring order statistics
        srt = np.sort(e)
        i = float(q) * (len(e) - 1)
        gap = srt[min(int(i) + 1, len(e) - 1)] - srt[max(int(i) - 1, 0)]
        assert abs(v - np.quantile(e, float(q))) <= res["quantile_error_bound"] + gap
    top = np.argsort(-np.abs(e))[:5]
    assert [r["row"] for r in diag["top_residuals"]] == top.tolist()
    assert [r["host"] for r in diag["top_residuals"]] == t["host"].to_numpy()[top].tolist()
    np.testing.assert_allclose([r["residual"] for r in diag["top_residuals"]], e[top], rtol=1e-9)


def test_leverages_match_statsmodels():
    d = sm.datasets.stackloss.load_pandas().data
    feats = ["AIRFLOW", "WATERTEMP", "ACIDCONC"]
    t = pa.table({c: d[c].to_numpy(float) for c in feats + ["STACKLOSS"]})
    model = tallfit.fit(t, target="STACKLOSS", features=feats)
    diag = build_diagnostics(model, second_pass(model, t, top_k=21, batch_rows=4))
    ref = sm.OLS(d["STACKLOSS"].to_numpy(float), sm.add_constant(d[feats].to_numpy(float))).fit()
    hat = ref.get_influence().hat_matrix_diag
    rows = diag["top_leverage"]
    np.testing.assert_allclose([r["leverage"] for r in rows], hat[[r["row"] for r in rows]], rtol=1e-10)
    assert [r["row"] for r in rows][:3] == np.argsort(-hat)[:3].tolist()


def test_grid_kernels_match_reference():
    rng = np.random.default_rng(9)
    A = np.asfortranarray(np.column_stack([rng.lognormal(0, 1.5, 5000), rng.normal(size=5000), np.ones(5000)]))
    e = rng.normal(size=5000)
    lo, scale = np.array([0.5, -1.0]), np.array([40.0, 100.0])
    out = np.zeros((2, 130, 4))
    grid_bin_sums(A, np.array([0, 1]), e, lo, scale, 128, out, np.empty(5000, dtype=np.int64))
    ref = grid_bin_sums_reference(A[:, :2], e, lo, scale, 128)
    np.testing.assert_allclose(out, ref, rtol=1e-12, atol=1e-9)
    idx = np.empty(5000, dtype=np.int64)
    grid_index(A[:, 1], -1.0, 100.0, 128, idx)
    assert (idx == grid_index_reference(A[:, 1], -1.0, 100.0, 128)).all()


@pytest.mark.parametrize("m", [1, 2, 7, 2001, 131_072])
def test_grid_tail_points_equal_numpy_quantile(m):
    # reference: numpy.quantile's default (linear) method, which the grid bounds used before
    rng = np.random.default_rng(m)
    S = np.asfortranarray(np.column_stack([rng.lognormal(0, 2, m), rng.normal(size=m), np.full(m, 3.0),
                                           rng.integers(0, 4, m).astype(float)]))
    for q in (0.0005, 0.01, 0.3):
        lo, hi = tail_points(S, q)
        ref = np.quantile(S, [q, 1.0 - q], axis=0)
        np.testing.assert_allclose(lo, ref[0], rtol=1e-14, atol=0)
        np.testing.assert_allclose(hi, ref[1], rtol=1e-14, atol=0)


def _flags(quadratic: float, seeds: range) -> list[bool]:
    flagged = []
    for seed in seeds:
        t = _line_data(seed, 4000, quadratic=quadratic)
        model = tallfit.fit(t, target="power", features=["load", "temp"])
        diag = build_diagnostics(model, second_pass(model, t))
        flagged.append({f["name"]: f["curvature"]["curved"] for f in diag["features"]})
    return flagged


def test_curvature_flag_rates():
    seeds = range(100, 130)
    linear = _flags(0.0, seeds)
    curved = _flags(0.1, seeds)  # 0.1·(temp − 24)²: about 0.9 at one sd of temp, noise sd 1
    # Under a straight line the flag needs p < 0.01/2, so about 0.3 false flags in 60 tests
    assert sum(f["temp"] + f["load"] for f in linear) <= 2
    assert sum(f["temp"] for f in curved) >= 29
    assert sum(f["load"] for f in curved) <= 2  # the bend is in temp, not in load


def test_advice_names_the_curved_feature_and_unequal_noise():
    rng = np.random.default_rng(4)
    n = 20000
    load = rng.uniform(0, 1, n)
    temp = rng.normal(24, 3, n)
    y = 100 + 50 * load + 0.3 * (temp - 24) ** 2 + rng.normal(0, 1 + 3 * load, n)
    t = pa.table({"load": load, "temp": temp, "power": y})
    model = tallfit.fit(t, target="power", features=["load", "temp"])
    diag = build_diagnostics(model, second_pass(model, t))
    text = " ".join(diag["advice"])
    assert "temp: the straight line misses a bend (bends upward" in text and "squared term of temp" in text
    assert "the noise is not constant" in text and "--robust HC3" in text
    assert diag["same_data"]


def test_other_data_is_reported_not_mixed_with_robust_errors():
    t = _line_data(5, 3000, quadratic=0.0)
    other = _line_data(6, 3000, quadratic=0.0)
    model = tallfit.fit(t, target="power", features=["load", "temp"])
    found = tallfit.api.diagnose(model, other)
    assert found["diagnostics"]["same_data"] is False
    assert found["diagnostics"]["breusch_pagan"] is None
    assert found["model"].robust is None
    assert any("not the rows the model was fitted on" in a for a in found["diagnostics"]["advice"])


def test_weighted_model_without_intercept_bins_rows_in_their_own_units():
    """Weighted rows arrive scaled by √w; the binned checks divide by it again (the blocks carry
    w), so a weighted fit without an intercept gets its residual checks too (ccard, statsmodels'
    copy of Greene's credit-card data, weights 1/INCOME): counts and Σx per feature are the data's,
    Σe² is that of the Pearson residuals √w·e of statsmodels' WLS."""
    d = sm.datasets.ccard.load_pandas().data
    w = 1.0 / d.INCOME.to_numpy(float)
    table = pa.table({c: d[c].to_numpy(float) for c in ["AVGEXP", "AGE", "INCOME"]}).append_column("w", pa.array(w))
    model = tallfit.fit(table, "AVGEXP", ["AGE", "INCOME"], weights="w", intercept=False)
    sp = second_pass(model, table)
    ref = sm.WLS(d.AVGEXP.to_numpy(float), d[["AGE", "INCOME"]].to_numpy(float), weights=w).fit()
    for j, f in enumerate(["AGE", "INCOME"]):
        sums = sp.feature_bins.sums[j]
        assert sums[:, 0].sum() == len(d)
        np.testing.assert_allclose(sums[:, 1].sum(), d[f].sum(), rtol=1e-12)
        np.testing.assert_allclose(sums[:, 3].sum(), np.sum(ref.wresid**2), rtol=1e-9)
    assert len(build_diagnostics(model, sp)["features"]) == 2


def test_rows_are_named_by_their_place_when_a_filter_drops_rows(tmp_path):
    """With --where, the largest residuals and a failing row are named by their row in the file
    (the filter's rows out counted), not by their place among the rows kept (a property: the id
    column holds each row's number)."""
    import pyarrow.parquet as pq

    from tallfit.errors import DataSourceError

    t = _line_data(5, 3000, quadratic=0.0, noise=1.0)
    t = t.append_column("id", pa.array(np.arange(3000))).append_column("odd", pa.array(np.arange(3000) % 2))
    y = t["power"].to_numpy().copy()
    y[[1777, 2000]] += 500.0  # 1777 kept by the filter, 2000 filtered out
    t = t.set_column(t.schema.get_field_index("power"), "power", pa.array(y))
    pq.write_table(t, tmp_path / "d.parquet", row_group_size=700)
    model = tallfit.fit(tmp_path / "d.parquet", target="power", features=["load", "temp"], where="odd = 1",
                        batch_rows=500)
    sp = second_pass(model, tmp_path / "d.parquet", keep=["id"], top_k=3, batch_rows=500)
    top = build_diagnostics(model, sp)["top_residuals"]
    assert top[0]["id"] == 1777
    assert [r["row"] for r in top] == [r["id"] for r in top]
    load = t["load"].to_numpy().copy()
    load[1500] = np.nan  # even: filtered out, not a failure
    load[1501] = np.nan
    pq.write_table(t.set_column(t.schema.get_field_index("load"), "load", pa.array(load)), tmp_path / "m.parquet",
                   row_group_size=700)
    with pytest.raises(DataSourceError, match=r"rows 1400-1899 \(row 101 of the batch\)"):  # 1501 = 1400 + 101
        tallfit.fit(tmp_path / "m.parquet", target="power", features=["load", "temp"], where="odd = 1",
                    missing={"load": "fail"}, batch_rows=500)
