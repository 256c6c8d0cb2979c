"""Categorical columns and absorbed keys without dense indicator columns (engine/levels_pass.py),
weights with absorbed keys and per-group models, and levels dropped after the pass.

References: statsmodels OLS/WLS with explicit dummy columns (statsmodels.regression.linear_model)
on the grunfeld firm-year panel statsmodels ships (Grunfeld 1958, as in Greene, Econometric
Analysis); the dense-indicator path of tallfit itself for the structured one (equal to rounding).
Invented data only where a property is checked (many cells, levels first seen late)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.errors import DesignError

sm = pytest.importorskip("statsmodels.api")


def _grunfeld():
    df = sm.datasets.grunfeld.load_pandas().data
    rng = np.random.default_rng(3)  # a weight per row, as a precision would be
    w = rng.uniform(0.2, 3.0, len(df))
    table = pa.table({"invest": df.invest.to_numpy(), "value": df.value.to_numpy(),
                      "capital": df.capital.to_numpy(), "firm": df.firm.astype(str).to_numpy(),
                      "year": df.year.astype(int).astype(str).to_numpy(), "w": w})
    return df, table, w


def _dummies(labels, levels):
    return np.column_stack([(labels == lv).astype(float) for lv in levels])


def _dense_fit(table, target, features, **kw):
    """The same fit through the dense-indicator pass (method other than the default)."""
    from tallfit.engine import levels_pass

    original = levels_pass.structured_applies
    levels_pass_applies = lambda spec: False  # noqa: E731
    import tallfit.api as api

    api.structured_applies = levels_pass_applies
    try:
        return tallfit.fit(table, target, features, **kw)
    finally:
        api.structured_applies = original


@pytest.mark.parametrize("kw", [
    {"categorical": ["firm", "year"], "reference": {"firm": "US Steel"}},
    {"categorical": ["year"], "absorb": "firm"},
    {"categorical": ["year"], "absorb": "firm", "weights": "w"},
    {"categorical": ["firm"], "weights": "w", "weight_kind": "frequency"},
])
def test_structured_pass_equals_dense_indicator_pass(kw):
    _, table, _ = _grunfeld()
    fast = tallfit.fit(table, "invest", ["value", "capital"], batch_rows=23, **kw)
    dense = _dense_fit(table, "invest", ["value", "capital"], batch_rows=23, **kw)
    assert fast.terms == dense.terms
    # Estimates near zero (a year effect of 1.2 with a standard error of 21) differ by rounding
    # that depends on the BLAS kernels of the machine: judge them on the scale of their own
    # standard errors, and the standard errors relative to themselves.
    se = dense.inference.std_error
    np.testing.assert_array_less(np.abs(fast.inference.estimate - dense.inference.estimate), 1e-9 * se)
    np.testing.assert_allclose(fast.inference.std_error, se, rtol=1e-9)
    assert fast.inference.df_resid == dense.inference.df_resid
    np.testing.assert_allclose(fast.inference.r_squared, dense.inference.r_squared, rtol=1e-10)


def test_many_cells_fall_back_to_dense_indicators_mid_pass(monkeypatch):
    import tallfit.engine.levels_pass as lp

    _, table, _ = _grunfeld()
    before = tallfit.fit(table, "invest", ["value"], categorical=["firm", "year"], batch_rows=30)
    monkeypatch.setattr(lp, "MAX_CELLS", 40)  # the 220 firm-year cells exceed it after two batches
    after = tallfit.fit(table, "invest", ["value"], categorical=["firm", "year"], batch_rows=30)
    np.testing.assert_allclose(after.inference.estimate, before.inference.estimate, rtol=1e-9)
    np.testing.assert_allclose(after.inference.std_error, before.inference.std_error, rtol=1e-9)
    assert after.accumulator.n_used == before.accumulator.n_used == 220


def test_weighted_absorbed_key_equals_wls_with_explicit_dummies():
    df, table, w = _grunfeld()
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm", weights="w", batch_rows=17)
    firms = sorted(set(df.firm))
    X = np.column_stack([df.value, df.capital, _dummies(df.firm.to_numpy(), firms)])
    res = sm.WLS(df.invest.to_numpy(), X, weights=w).fit()
    inf = model.inference
    np.testing.assert_allclose(inf.estimate, res.params[:2], rtol=1e-9)
    np.testing.assert_allclose(inf.std_error, res.bse[:2], rtol=1e-9)
    assert inf.df_resid == res.df_resid
    np.testing.assert_allclose(inf.log_likelihood, res.llf, rtol=1e-10)
    np.testing.assert_allclose(inf.r_squared, res.rsquared, rtol=1e-9)
    effects = model.coding["absorbed"]["effects"]
    np.testing.assert_allclose([effects[f] for f in firms], res.params[2:], rtol=1e-8)


def test_frequency_weighted_absorbed_key_counts_weights_as_rows():
    df, table, _ = _grunfeld()
    reps = (np.arange(len(df)) % 3 + 1).astype(float)
    table = table.set_column(table.schema.get_field_index("w"), "w", pa.array(reps))
    model = tallfit.fit(table, "invest", ["value", "capital"], absorb="firm", weights="w",
                        weight_kind="frequency")
    firms = sorted(set(df.firm))
    r = reps.astype(int)
    X = np.repeat(np.column_stack([df.value, df.capital, _dummies(df.firm.to_numpy(), firms)]), r, axis=0)
    res = sm.OLS(np.repeat(df.invest.to_numpy(), r), X).fit()
    assert model.inference.df_resid == res.df_resid
    np.testing.assert_allclose(model.inference.std_error, res.bse[:2], rtol=1e-9)


def test_weighted_categorical_with_absorbed_key_equals_wls():
    df, table, w = _grunfeld()
    model = tallfit.fit(table, "invest", ["value"], categorical=["year"], absorb="firm", weights="w",
                        reference={"year": "1935"})
    firms = sorted(set(df.firm))
    years = sorted(set(table["year"].to_pylist()) - {"1935"})
    yr = np.array(table["year"].to_pylist())
    X = np.column_stack([df.value, _dummies(yr, years), _dummies(df.firm.to_numpy(), firms)])
    res = sm.WLS(df.invest.to_numpy(), X, weights=w).fit()
    np.testing.assert_allclose(model.inference.estimate, res.params[:1 + len(years)], rtol=1e-8)
    np.testing.assert_allclose(model.inference.std_error, res.bse[:1 + len(years)], rtol=1e-8)


def test_weighted_groups_equal_separate_wls_fits():
    df, table, w = _grunfeld()
    g = tallfit.fit(table, "invest", ["value", "capital"], by=["firm"], weights="w", batch_rows=31)
    for firm in ("General Motors", "US Steel", "Atlantic Refining"):
        sel = (df.firm == firm).to_numpy()
        res = sm.WLS(df.invest.to_numpy()[sel], sm.add_constant(df[["value", "capital"]].to_numpy()[sel]),
                     weights=w[sel]).fit()
        m = g.groups[firm]
        np.testing.assert_allclose(m.inference.estimate, res.params, rtol=1e-9)
        np.testing.assert_allclose(m.inference.std_error, res.bse, rtol=1e-9)
        np.testing.assert_allclose(m.inference.log_likelihood, res.llf, rtol=1e-10)


def test_dropped_level_equals_a_direct_fit_with_that_coding():
    df, table, _ = _grunfeld()
    model = tallfit.fit(table, "invest", ["value", "capital"], categorical=["firm"],
                        reference={"firm": "US Steel"}, drop_levels={"firm": ["Chrysler", "IBM"]},
                        batch_rows=19)
    kept = sorted(set(df.firm) - {"US Steel", "Chrysler", "IBM"})
    X = np.column_stack([np.ones(len(df)), df.value, df.capital, _dummies(df.firm.to_numpy(), kept)])
    res = sm.OLS(df.invest.to_numpy(), X).fit()
    assert model.terms == ["(intercept)", "value", "capital"] + [f"firm[{f}]" for f in kept]
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=1e-9)
    np.testing.assert_allclose(model.inference.std_error, res.bse, rtol=1e-9)
    assert model.coding["columns"]["firm"]["dropped"] == ["Chrysler", "IBM"]
    pred = tallfit.predict(model, table)["prediction"].to_numpy()  # their rows scored as US Steel
    np.testing.assert_allclose(pred, res.fittedvalues, rtol=1e-9)
    with pytest.raises(DesignError, match="cannot drop level 'Acme'"):
        tallfit.fit(table, "invest", ["value"], categorical=["firm"], drop_levels={"firm": ["Acme"]})
    with pytest.raises(DesignError, match="both the reference and dropped"):
        tallfit.fit(table, "invest", ["value"], categorical=["firm"], reference={"firm": "IBM"},
                    drop_levels={"firm": ["IBM"]})


def test_level_tables_equal_python_dictionaries():
    from tallfit.design.categorical import IntTable, StringTable

    rng = np.random.default_rng(0)
    labels = [f"h{v:05d}" for v in rng.integers(0, 3000, 20_000)] + ["", "é-ü"]
    t, ref = StringTable(), {}
    for start in range(0, len(labels), 997):  # in batches, so the table grows and rehashes
        part = labels[start:start + 997]
        ids = t.ids(pa.array(part))
        expect = [ref.setdefault(s, len(ref)) for s in part]
        assert ids.tolist() == expect
    keys = rng.integers(0, 1 << 40, 5000)
    keys = np.concatenate([keys, keys[:100]])
    it = IntTable()
    ids = it.ids(keys)
    ref = {}
    assert ids.tolist() == [ref.setdefault(int(k), len(ref)) for k in keys]
    # in batches of mostly known keys, some new and negative: the table grows inside a batch
    for b in range(6):
        part = np.concatenate([rng.choice(keys, 700), -rng.integers(1, 1 << 50, 300 * b)])
        assert it.ids(part).tolist() == [ref.setdefault(int(k), len(ref)) for k in part]
    assert it.n == len(ref) and it.table.size >= 2 * it.n


def test_table_adoption_and_shared_seed_equal_plain_hashing():
    """Property: adopting another table's labels (prefix matched by buffers, or hashed) and a fresh
    table started from the shared seed give the ids a Python dictionary gives."""
    from tallfit.design import categorical
    from tallfit.design.categorical import StringTable

    rng = np.random.default_rng(1)
    base = [f"k{v:06d}" for v in rng.permutation(9000)]
    extra = [f"x{v}" for v in range(50)]

    def table(labels):
        t = StringTable()
        t.ids(pa.array(labels))
        return t

    def expect(mine, theirs):
        ref = {s: i for i, s in enumerate(mine)}
        return [ref.setdefault(s, len(ref)) for s in theirs]

    cases = [(base, base + extra), (base + extra, base), (base, base), (extra + base, base),
             (base[:4000] + extra, base)]
    for mine, theirs in cases:
        a, b = table(mine), table(theirs)
        got = a.adopt(b)
        assert got.tolist() == expect(mine, theirs)
        assert a.labels().to_pylist() == list(dict.fromkeys(mine + theirs))
    table(base)
    assert categorical._seed is None  # outside shared_labels() nothing is kept
    with categorical.shared_labels():
        first = table(base)  # hashed and kept as the seed
        again = StringTable()
        ids = again.ids(pa.array(base))  # from the seed: the same state
        assert ids.tolist() == list(range(len(base)))
        assert categorical._seed is not None and categorical._seed[0].equals(pa.array(base))
        assert np.array_equal(again.table, first.table) and again.n == first.n
        assert again.ids(pa.array(extra + base[:5])).tolist() == list(range(9000, 9050)) + [0, 1, 2, 3, 4]
        assert first.n == 9000  # the seed's copy was not shared with the table that grew
        other = StringTable().ids(pa.array(base[::-1]))  # same length, other labels order: hashed
        assert other.tolist() == list(range(len(base)))
        assert StringTable().ids(pa.array(base)).tolist() == list(range(len(base)))
    assert categorical._seed is None  # dropped when the pass ends


def test_new_level_codes_numbered_in_code_order():
    """number_new_codes against a numpy reference (np.unique of the codes not numbered yet)."""
    from tallfit.kernels.groups import number_new_codes

    rng = np.random.default_rng(2)
    index = np.full(40, -1, dtype=np.int64)
    ref = index.copy()
    members = 0
    for _ in range(6):
        codes = rng.integers(0, 40, 300) if _ else rng.integers(0, 10, 300)
        out = np.empty((300, 2), dtype=np.int64)
        fresh = np.empty(40, dtype=np.int64)
        n = number_new_codes(codes, index, members, out, 1, fresh)
        new = np.unique(codes[ref[codes] < 0])
        ref[new] = members + np.arange(new.size)
        assert n == new.size and fresh[:n].tolist() == new.tolist()
        assert np.array_equal(out[:, 1], ref[codes]) and np.array_equal(index, ref)
        members += n


@pytest.mark.parametrize("C", [1, 2, 3])
def test_key_level_moments_equal_numpy(C):
    """within_rows_levels (one, two — its written-out case — and three categorical columns) against
    direct numpy sums: per (key level, indicator) weights, the indicator cross weights, the sums of
    w(z − s_g) with s_g the level's first row, the level means, and the rows' Gram equal to the
    weighted within-level co-moment. Data invented (a property test)."""
    from tallfit.kernels.groups import within_rows_levels

    rng = np.random.default_rng(C)
    m, k, G = 3000, 4, 40
    sizes = [3, 5, 7][:C]
    Z = np.asfortranarray(rng.standard_normal((m, k)) + 5.0)
    g = rng.integers(0, G, m)
    first = [0] + list(np.cumsum(sizes)[:-1])
    levels = np.column_stack([f + rng.integers(0, s, m) for f, s in zip(first, sizes)]).astype(np.int64)
    w = rng.uniform(0.5, 2.0, m)
    w[::17] = 0.0  # zero weights are skipped
    L = sum(sizes)
    state = np.zeros((G, 1 + 2 * k))
    kl, cross, sums = np.zeros((G, L)), np.zeros((L, L)), np.zeros((L, k))
    out = np.zeros((m, k), order="F")
    half = m // 2  # in two calls, as blocks arrive
    r = within_rows_levels(Z[:half], g[:half], levels[:half], w[:half], state, kl, cross, sums, out)
    r += within_rows_levels(np.asfortranarray(Z[half:]), g[half:], levels[half:], w[half:], state, kl, cross,
                            sums, out[r:])
    used = w > 0
    Zu, gu, lu, wu = Z[used], g[used], levels[used], w[used]
    D = np.zeros((used.sum(), L))
    for c in range(C):
        D[np.arange(len(gu)), lu[:, c]] = 1.0
    onehot_g = np.zeros((len(gu), G))
    onehot_g[np.arange(len(gu)), gu] = 1.0
    np.testing.assert_allclose(kl, onehot_g.T @ (wu[:, None] * D), rtol=1e-13)
    np.testing.assert_allclose(np.triu(cross), np.triu(D.T @ (wu[:, None] * D)), rtol=1e-13)
    shift = np.array([Zu[np.flatnonzero(gu == v)[0]] for v in range(G)])
    np.testing.assert_allclose(sums, D.T @ (wu[:, None] * (Zu - shift[gu])), rtol=1e-11, atol=1e-11)
    W = onehot_g.T @ wu
    means = (onehot_g.T @ (wu[:, None] * Zu)) / W[:, None]
    np.testing.assert_allclose(state[:, 0], W, rtol=1e-13)
    np.testing.assert_allclose(state[:, 1:1 + k], means, rtol=1e-12)
    dev = Zu - means[gu]
    np.testing.assert_allclose(out[:r].T @ out[:r], dev.T @ (wu[:, None] * dev), rtol=1e-10)
    assert r == used.sum() - G  # a level's first row writes nothing
