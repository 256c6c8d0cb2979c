"""Per-group models: equal to separate fits on each group's rows (statsmodels OLS per group as
the reference), small groups reported not fatal, prediction routed by group, file round trip."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallfit
from tallfit.errors import DesignError
from tallfit.grouped import GroupedFit, fit_groups

sm = pytest.importorskip("statsmodels.api")


@pytest.fixture
def fleet():
    rng = np.random.default_rng(21)
    n = 1200
    region = rng.choice(["north-1", "west-2", "east-3"], n, p=[0.5, 0.497, 0.003])
    cls = rng.choice(["compute-a", "storage-b"], n)
    cpu = rng.uniform(0, 1, n)
    slope = np.select([region == "north-1", region == "west-2"], [150.0, 190.0], 100.0)
    y = 90 + slope * cpu + 12 * (cls == "storage-b") + rng.normal(0, 5, n)
    return pa.table({"cpu": cpu, "region": region, "cls": cls, "power": y})


def test_groups_equal_separate_fits(fleet, tmp_path):
    g = tallfit.fit(fleet, "power", ["cpu"], categorical=["cls"], by=["region"], batch_rows=97,
                    reference={"cls": "compute-a"})
    assert isinstance(g, GroupedFit)
    region = np.array(fleet["region"].to_pylist())
    for key in ("north-1", "west-2"):
        sel = region == key
        X = np.column_stack([np.ones(sel.sum()), fleet["cpu"].to_numpy()[sel],
                             (np.array(fleet["cls"].to_pylist())[sel] == "storage-b").astype(float)])
        res = sm.OLS(fleet["power"].to_numpy()[sel], X).fit()
        m = g.groups[key]
        np.testing.assert_allclose(m.inference.estimate, res.params, rtol=1e-10)
        np.testing.assert_allclose(m.inference.std_error, res.bse, rtol=1e-10)
    # east-3 has a handful of rows: listed with a reason, or fitted if it happens to have enough
    n_east = int((region == "east-3").sum())
    assert ("east-3" in g.failed) or (g.groups["east-3"].inference.n_used == n_east)
    pred = tallfit.predict(g, fleet)["prediction"].to_numpy()
    m = g.groups["west-2"]
    sel = region == "west-2"
    Xw = np.column_stack([np.ones(sel.sum()), fleet["cpu"].to_numpy()[sel],
                          (np.array(fleet["cls"].to_pylist())[sel] == "storage-b").astype(float)])
    np.testing.assert_allclose(pred[sel], Xw @ m.inference.estimate, rtol=1e-12)
    path = tmp_path / "g.json"
    g.save(path)
    back = tallfit.load(path)
    assert isinstance(back, GroupedFit) and back.to_dict() == g.to_dict()
    assert "per region" in back.summary()


def test_group_without_model_gets_null_prediction(fleet, tmp_path):
    g = tallfit.fit(fleet, "power", ["cpu"], by=["region"])
    new = pa.table({"cpu": [0.5, 0.5], "region": ["north-1", "south-9"]})
    pred = tallfit.predict(g, new)["prediction"].to_pylist()
    assert pred[0] is not None and pred[1] is None
    # interleaved groups, a null key and an unseen one: each row scored by its own group's model
    cpu = [0.1, 0.9, 0.4, 0.7, 0.2, 0.6]
    region = ["west-2", "north-1", None, "west-2", "south-9", "north-1"]
    report = tallfit.predict(g, pa.table({"cpu": cpu, "region": region}), batch_rows=4,
                             out=tmp_path / "p.parquet")
    assert report.rows == 6 and report.rows_without_group_model == 2
    pred = pq.read_table(report.out)["prediction"].to_pylist()
    for x, r, p in zip(cpu, region, pred):
        if r in (None, "south-9"):
            assert p is None
        else:
            b = g.groups[r].inference.estimate
            assert p == pytest.approx(b[0] + b[1] * x, rel=1e-12)


def test_too_many_groups_is_a_clear_error(fleet):
    from tallfit.design.build import make_spec
    from tallfit.design.design import Design
    from tallfit.inputs import as_source

    spec = make_spec("power", ["cpu"], by=["region"])
    with pytest.raises(DesignError, match="coarser"):
        fit_groups(as_source(fleet), spec, 100, None, Design(spec), lambda acc: None, budget=10)


def _grunfeld_eras():
    d = sm.datasets.grunfeld.load_pandas().data
    d["era"] = np.where(d.year < 1945, "early", "late")
    table = pa.table({"invest": d.invest.to_numpy(float), "value": d.value.to_numpy(float),
                      "capital": d.capital.to_numpy(float), "firm": d.firm.astype(str).to_numpy(),
                      "year": d.year.to_numpy(np.int64), "era": d.era.to_numpy()})
    return d, table


@pytest.mark.parametrize("opts", [{"robust": "HC3"}, {"robust": "HC1"}, {"cluster": "firm"}])
def test_group_robust_errors_equal_statsmodels_on_each_groups_rows(opts, tmp_path):
    """Robust and firm-clustered errors per era of the grunfeld panel (statsmodels ships it) equal
    statsmodels OLS(...).fit(cov_type=...) on that era's rows alone; they survive the model file."""
    d, table = _grunfeld_eras()
    g = tallfit.fit(table, "invest", "value,capital", by="era", batch_rows=17, **opts)
    kind = opts.get("robust") or "cluster"
    for key in ("early", "late"):
        rows = d[d.era == key]
        ols = sm.OLS(rows.invest.to_numpy(float), sm.add_constant(rows[["value", "capital"]].to_numpy(float)))
        if kind == "cluster":
            ref = ols.fit(cov_type="cluster", cov_kwds={"groups": rows.firm.factorize()[0]})
            est = g.groups[key].robust["estimators"]["cluster:firm"]
        else:
            ref = ols.fit(cov_type=kind)
            est = g.groups[key].robust["estimators"][kind]
        np.testing.assert_allclose(est["std_error"], ref.bse, rtol=1e-9)
    text = g.summary()
    assert "from a second pass" in text
    if kind == "cluster":
        assert text.count("only 11 clusters by firm") == 1  # one note for the groups that share it
    g.save(tmp_path / "g.json")
    assert tallfit.load(tmp_path / "g.json").to_dict() == g.to_dict()


def test_group_robust_errors_with_each_groups_own_coding():
    """A categorical whose levels differ by group (year within era): each group's rows go through
    its own coding; HC1 equals statsmodels with that group's year dummies."""
    d, table = _grunfeld_eras()
    g = tallfit.fit(table, "invest", ["value", "capital"], categorical="year", by="era", robust="HC1")
    for key in ("early", "late"):
        rows = d[d.era == key]
        m = g.groups[key]
        years = sorted(set(rows.year))
        ref_year = [int(t.split("[")[1].rstrip("]")) for t in m.terms if t.startswith("year[")]
        base = [y for y in years if y not in ref_year]
        assert len(base) == 1
        D = np.column_stack([(rows.year.to_numpy() == y).astype(float) for y in ref_year])
        X = np.column_stack([np.ones(len(rows)), rows.value, rows.capital, D])
        ref = sm.OLS(rows.invest.to_numpy(float), X).fit(cov_type="HC1")
        np.testing.assert_allclose(m.robust["estimators"]["HC1"]["std_error"], ref.bse, rtol=1e-8)


def test_a_group_with_one_cluster_gets_a_note_not_a_failure():
    d, table = _grunfeld_eras()
    one = pa.array(np.where(d.era == "early", "c0", d.firm.astype(str)))
    table = table.append_column("site", one)
    g = tallfit.fit(table, "invest", ["value", "capital"], by="era", cluster="site")
    assert g.groups["early"].robust is None and g.groups["late"].robust is not None
    assert any("at least 2 clusters" in w for w in g.groups["early"].warnings)
    assert "no robust errors for this group" in g.summary()


def test_group_robust_errors_with_frequency_weights_equal_repeated_rows():
    """Frequency weights 1, 2, 3, … (ours) per era: firm-clustered and HC3 errors equal statsmodels
    on that era's rows repeated w times."""
    d, table = _grunfeld_eras()
    r = np.arange(len(d)) % 3 + 1
    table = table.append_column("n", pa.array(r.astype(float)))
    for opts, kind in (({"robust": "HC3"}, "HC3"), ({"cluster": "firm"}, "cluster:firm")):
        g = tallfit.fit(table, "invest", ["value", "capital"], by="era", weights="n", weight_kind="frequency",
                        batch_rows=17, **opts)
        for key in ("early", "late"):
            sel = (d.era == key).to_numpy()
            reps = r[sel]
            X = np.repeat(sm.add_constant(d[["value", "capital"]].to_numpy(float)[sel]), reps, axis=0)
            ols = sm.OLS(np.repeat(d.invest.to_numpy(float)[sel], reps), X)
            ref = (ols.fit(cov_type="HC3") if kind == "HC3" else
                   ols.fit(cov_type="cluster", cov_kwds={"groups": np.repeat(d.firm.factorize()[0][sel], reps)}))
            np.testing.assert_allclose(g.groups[key].robust["estimators"][kind]["std_error"], ref.bse, rtol=1e-9)


def test_checking_one_group_equals_statsmodels_on_its_rows(tmp_path):
    """diagnose(group=...) reads only that group's rows: its HC3 errors and Breusch–Pagan test equal
    statsmodels OLS / het_breuschpagan on that era's rows of grunfeld; two grouping columns (one of
    them integer) name a group as the summary does."""
    from statsmodels.stats.diagnostic import het_breuschpagan

    from tallfit.api import diagnose

    d, table = _grunfeld_eras()
    path = tmp_path / "g.parquet"
    pq.write_table(table, path, row_group_size=50)
    g = tallfit.fit(path, "invest", ["value", "capital"], by="era", batch_rows=37)
    out = diagnose(g, path, group="late", keep=["year"])
    rows = d[d.era == "late"]
    X = sm.add_constant(rows[["value", "capital"]].to_numpy(float))
    ref = sm.OLS(rows.invest.to_numpy(float), X).fit()
    np.testing.assert_allclose(out["model"].robust["estimators"]["HC3"]["std_error"],
                               ref.get_robustcov_results(cov_type="HC3").bse, rtol=1e-9)
    lm, lm_p, _, _ = het_breuschpagan(ref.resid, X)
    bp = out["diagnostics"]["breusch_pagan"]
    np.testing.assert_allclose([bp["statistic"], bp["p_value"]], [lm, lm_p], rtol=1e-8)
    assert out["diagnostics"]["n_used"] == len(rows)
    top = out["diagnostics"]["top_residuals"][0]
    assert top["year"] >= 1945 and d.year.iloc[top["row"]] == top["year"]  # named by its row in the file
    g2 = tallfit.fit(path, "invest", ["value"], by=["era", "year"], batch_rows=37)
    two = diagnose(g2, path, group="early | 1935", robust="HC1")
    assert two["diagnostics"]["n_used"] == int((d.year == 1935).sum()) == two["model"].inference.n_used
    every = diagnose(g, path, keep=["year"])  # every group from one pass: the same numbers for "late"
    late = every["groups"]["late"]
    np.testing.assert_allclose(late["model"].robust["estimators"]["HC3"]["std_error"],
                               ref.get_robustcov_results(cov_type="HC3").bse, rtol=1e-9)
    np.testing.assert_allclose(late["diagnostics"]["breusch_pagan"]["statistic"], lm, rtol=1e-8)
    assert late["diagnostics"]["top_residuals"] == out["diagnostics"]["top_residuals"]
    assert set(every["groups"]) == set(g.groups)
    with pytest.raises(DesignError, match="no model for group 'middle'"):
        diagnose(g, path, group="middle")
    with pytest.raises(DesignError, match="not one per group"):
        diagnose(g.groups["late"], path, group="late")



def test_group_factors_merge_across_level_orders():
    """Two parts that met a categorical's levels in different orders: their merged group factors
    give every group the Gram of all its rows (a property: R'R = Σ xxᵀ, in the union's columns)."""
    from tallfit.design.design import Design
    from tallfit.design.build import make_spec
    from tallfit.grouped import GroupAccumulators

    rng = np.random.default_rng(5)
    spec = make_spec("y", ["x"], categorical=["c"], by=["g"])
    tables = [pa.table({"x": rng.normal(size=400), "c": rng.choice(levels, 400), "g": rng.choice(["a", "b"], 400),
                        "y": rng.normal(size=400)}) for levels in (["p", "q", "r"], ["r", "s", "p"])]
    parts = []
    for t in tables:
        acc = GroupAccumulators(spec.term_names + [spec.target], list(spec.by))
        design = Design(spec)
        for b in t.to_batches(max_chunksize=97):
            block = design.block(b, "test", extra_columns=["g"])
            acc.update_block(block)
        parts.append(acc)
    merged = parts[0].merge(parts[1])
    whole = pa.concat_tables(tables)
    for key in ("a", "b"):
        acc = merged.accumulator(key)
        rows = np.array(whole["g"].to_pylist()) == key
        c = np.array(whole["c"].to_pylist())[rows]
        cols = {"(intercept)": np.ones(rows.sum()), "x": whole["x"].to_numpy()[rows], "y": whole["y"].to_numpy()[rows]}
        for name in acc.names:
            if name.startswith("c["):
                cols[name] = (c == name[2:-1]).astype(float)
        X = np.column_stack([cols[n] for n in acc.names])
        np.testing.assert_allclose(acc.R.T @ acc.R, X.T @ X, rtol=1e-10, atol=1e-8)
        assert acc.n_used == rows.sum()
        assert acc.level_counts["c"] == {lvl: int((c == lvl).sum()) for lvl in set(c)}


@pytest.mark.parametrize("kind", ["HC0", "HC2", "HC3", "cluster:day"])
def test_batched_group_sandwich_equals_each_groups_own_pass(kind, monkeypatch):
    """60 groups (one with a term aliased, so its model is narrower), analytic weights, HC kinds or
    clusters by day: the one-sweep sums (kernels/group_sandwich.py) give the robust errors of the
    per-group second pass (a property; that pass is checked against statsmodels above)."""
    import tallfit.engine.grouped_pass as gp

    rng = np.random.default_rng(9)
    n = 6000
    g = rng.integers(0, 60, n)
    x1, x2 = rng.normal(size=n), rng.normal(size=n)
    x2[g == 7] = 2.0 * x1[g == 7]  # aliased in group 7
    y = 1 + 2 * x1 - x2 + rng.normal(size=n) * (1 + np.abs(x1))
    t = pa.table({"x1": x1, "x2": x2, "y": y, "g": g.astype(str), "w": rng.uniform(0.5, 2.0, n),
                  "day": rng.integers(0, 30, n)})
    opts = {"cluster": "day"} if kind.startswith("cluster") else {"robust": kind}
    fast = tallfit.fit(t, "y", ["x1", "x2"], by="g", weights="w", drop_aliased=True, batch_rows=700, **opts)
    monkeypatch.setattr(gp, "_batched", lambda *a: False)
    slow = tallfit.fit(t, "y", ["x1", "x2"], by="g", weights="w", drop_aliased=True, batch_rows=700, **opts)
    assert len(fast.groups["7"].terms) == 2
    for key in slow.groups:
        np.testing.assert_allclose(fast.groups[key].robust["estimators"][kind]["covariance"],
                                   slow.groups[key].robust["estimators"][kind]["covariance"], rtol=1e-10, atol=1e-14)


def test_every_group_checked_at_once_with_own_codings_equals_each_alone(tmp_path, monkeypatch):
    """Per-group models with a categorical (each group its own coding): one pass over every group
    gives each group the robust errors, Breusch–Pagan sums and largest rows (named by file row) of
    checking it alone; beyond REPORT_GROUPS groups the check asks for --group."""
    import tallfit.api as api
    from tallfit.api import diagnose

    rng = np.random.default_rng(12)
    n = 9000
    g = rng.choice(["a", "b", "c"], n)
    c = np.where(g == "c", rng.choice(["x", "y"], n), rng.choice(["x", "y", "z"], n))
    x = rng.normal(size=n)
    y = 1 + 2 * x + (c == "y") * 3 + rng.normal(size=n) * (1 + np.abs(x))
    path = tmp_path / "t.parquet"
    pq.write_table(pa.table({"g": g, "c": c, "x": x, "y": y, "id": np.arange(n)}), path, row_group_size=2500)
    m = tallfit.fit(path, "y", ["x"], categorical=["c"], by="g", batch_rows=1000)
    every = diagnose(m, path, keep=["id"], batch_rows=700)
    for key, found in every["groups"].items():
        alone = diagnose(m, path, group=key, keep=["id"], batch_rows=700)
        a, b = found["diagnostics"], alone["diagnostics"]
        assert a["n_used"] == b["n_used"] == int((g == key).sum())
        np.testing.assert_allclose(found["model"].robust["estimators"]["HC3"]["std_error"],
                                   alone["model"].robust["estimators"]["HC3"]["std_error"], rtol=1e-12)
        assert a["breusch_pagan"]["statistic"] == pytest.approx(b["breusch_pagan"]["statistic"], rel=1e-12)
        assert a["top_residuals"] == b["top_residuals"]
        assert all(g[r["row"]] == key and r["id"] == r["row"] for r in a["top_residuals"])
    monkeypatch.setattr(api, "REPORT_GROUPS", 2)
    with pytest.raises(DesignError, match="name the group to check with --group"):
        diagnose(m, path)


def test_rows_held_for_every_groups_grids_stay_within_the_budget(tmp_path, monkeypatch):
    """Each group holds its first rows until they set its bin grids; in all they stay within
    GRID_SAMPLE_BYTES however many rows the data has (a fixed bound, not O(rows))."""
    from tallfit.api import diagnose
    from tallfit.engine import grouped_pass, second_pass

    rng = np.random.default_rng(3)
    n = 40_000
    g = rng.choice(["a", "b", "c", "d"], n)
    x = rng.normal(size=n)
    path = tmp_path / "t.parquet"
    pq.write_table(pa.table({"g": g, "x": x, "y": 2 * x + rng.normal(size=n)}), path, row_group_size=5000)
    m = tallfit.fit(path, "y", ["x"], by="g")
    width = 8 * (1 + 2)
    monkeypatch.setattr(grouped_pass, "GRID_SAMPLE_BYTES", 4 * 1500 * width)  # 1,500 rows per group
    monkeypatch.setattr(grouped_pass, "MIN_GROUP_SAMPLE", 100)
    held, peak = {}, [0]
    add = second_pass.GridsFirst.add

    def counting(self, block):
        add(self, block)
        held[id(self)] = sum(b.n_used for b in self.held)
        peak[0] = max(peak[0], sum(held.values()))

    monkeypatch.setattr(second_pass.GridsFirst, "add", counting)
    out = diagnose(m, path, batch_rows=1000)
    assert sum(f["diagnostics"]["n_used"] for f in out["groups"].values()) == n
    # a group sets its grids once it holds 1,500 rows; its last block (≤ 1,000 rows over 4 groups)
    # can take it past that by less than one block's share
    assert 0 < peak[0] <= 4 * (1500 + 1000)


def test_checking_data_without_a_groups_rows_says_so(tmp_path):
    """Data that lacks one group's rows: checking every group reports that group as not checked,
    checking only it (or data with no usable row at all) is a clear error, not a traceback."""
    from tallfit.api import diagnose
    from tallfit.render.group_report import write_group_report

    rng = np.random.default_rng(5)
    n = 6000
    g = rng.choice(["a", "b", "c"], n)
    x = rng.normal(size=n)
    y = x + rng.normal(size=n)
    full, part = tmp_path / "full.parquet", tmp_path / "part.parquet"
    pq.write_table(pa.table({"g": g, "x": x, "y": y}), full)
    keep = g != "c"
    pq.write_table(pa.table({"g": g[keep], "x": x[keep], "y": y[keep]}), part)
    m = tallfit.fit(full, "y", ["x"], by="g")
    out = diagnose(m, part)
    assert set(out["groups"]) == {"a", "b"} and out["unchecked"] == {"c": "no usable rows in this data"}
    html = tmp_path / "r.html"
    write_group_report(m, out["groups"], html, images=False, unchecked=out["unchecked"])
    assert "Not checked: c (no usable rows in this data)" in html.read_text(encoding="utf-8")
    with pytest.raises(DesignError, match="nothing to check in .*only group 'c'"):
        diagnose(m, part, group="c")
    empty = tmp_path / "empty.parquet"
    pq.write_table(pa.table({"g": ["a"], "x": [np.nan], "y": [1.0]}), empty)
    with pytest.raises(DesignError, match="no group of this model has a usable row"):
        diagnose(m, empty)


@pytest.mark.parametrize("kind", ["analytic", "frequency"])
def test_every_group_checked_at_once_with_weights_equals_each_alone(tmp_path, kind):
    """Weighted per-group models: one pass over every group gives each group the robust errors,
    Breusch–Pagan test and largest rows of checking it alone (each checked against statsmodels
    in the tests of the weighted second pass)."""
    from tallfit.api import diagnose

    rng = np.random.default_rng(17)
    n = 6000
    g = rng.choice(["a", "b", "c"], n)
    x = rng.normal(size=n)
    path = tmp_path / "w.parquet"
    pq.write_table(pa.table({"g": g, "x": x, "y": x + rng.normal(size=n) * (1 + np.abs(x)),
                             "w": rng.integers(1, 4, n).astype(float)}), path, row_group_size=1500)
    m = tallfit.fit(path, "y", ["x"], by="g", weights="w", weight_kind=kind)
    every = diagnose(m, path, batch_rows=1000)
    for key in "abc":
        alone = diagnose(m, path, group=key, batch_rows=1000)
        np.testing.assert_allclose(every["groups"][key]["model"].robust["estimators"]["HC3"]["std_error"],
                                   alone["model"].robust["estimators"]["HC3"]["std_error"], rtol=1e-12)
        assert every["groups"][key]["diagnostics"]["breusch_pagan"] == alone["diagnostics"]["breusch_pagan"]
        assert every["groups"][key]["diagnostics"]["top_residuals"] == alone["diagnostics"]["top_residuals"]
