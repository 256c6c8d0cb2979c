"""The structured levels pass over a data set of several parts (engine/levels_pass.py): per-part
accumulators merged in part order, levels matched by label.

References: statsmodels OLS/WLS with explicit dummy columns on the grunfeld firm-year panel
statsmodels ships (Grunfeld 1958); a property: 1, 2 and 3 workers give the same bits, and equal
the one-stream pass to rounding. The panel is sorted by firm, so later parts bring levels first
seen there."""

from __future__ import annotations

import numpy as np
import pyarrow.parquet as pq
import pytest

import tallfit

sm = pytest.importorskip("statsmodels.api")

from test_design_structured import _dummies, _grunfeld  # noqa: E402

CASES = [
    {"categorical": ["firm", "year"], "reference": {"firm": "US Steel"}},
    {"absorb": "firm"},
    {"categorical": ["year"], "absorb": "firm", "weights": "w", "reference": {"year": "1935"}},
    {"categorical": ["firm"], "weights": "w", "weight_kind": "frequency"},
]


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    df, table, w = _grunfeld()
    folder = tmp_path_factory.mktemp("grunfeld")
    for i in range(5):  # five files of 44 rows, each of three row groups
        pq.write_table(table.slice(44 * i, 44), folder / f"part{i}.parquet", row_group_size=15)
    return df, table, w, str(folder)


def _same_bits(a, b):
    assert a.terms == b.terms
    for x, y in [(a.inference.estimate, b.inference.estimate), (a.inference.std_error, b.inference.std_error)]:
        assert np.array_equal(x, y)
    assert a.inference.df_resid == b.inference.df_resid


@pytest.mark.parametrize("kw", CASES)
def test_any_worker_count_gives_the_same_bits_and_the_one_stream_answer(panel, kw):
    import tallfit.engine.levels_pass as lp

    _, table, _, folder = panel
    calls = []
    original = lp._parts_pass
    try:
        lp._parts_pass = lambda *a, **k: calls.append(1) or original(*a, **k)
        fits = [tallfit.fit(folder, "invest", ["value", "capital"], workers=w, batch_rows=13, **kw) for w in (1, 2, 3)]
    finally:
        lp._parts_pass = original
    assert calls == [1, 1, 1]  # the parts path was taken
    _same_bits(fits[0], fits[1])
    _same_bits(fits[0], fits[2])
    one = tallfit.fit(table, "invest", ["value", "capital"], batch_rows=13, **kw)
    assert fits[0].terms == one.terms
    np.testing.assert_allclose(fits[0].inference.estimate, one.inference.estimate, rtol=1e-9)
    np.testing.assert_allclose(fits[0].inference.std_error, one.inference.std_error, rtol=1e-9)
    assert fits[0].accumulator.n_used == one.accumulator.n_used == 220
    if "absorb" in kw:
        assert fits[0].coding["absorbed"]["levels"] == 11


def test_parts_equal_wls_with_explicit_dummies(panel):
    df, table, w, folder = panel
    model = tallfit.fit(folder, "invest", ["value"], categorical=["year"], absorb="firm", weights="w",
                        reference={"year": "1935"}, workers=2)
    firms = sorted(set(df.firm))
    yr = np.array(table["year"].to_pylist())
    years = sorted(set(yr) - {"1935"})
    X = np.column_stack([df.value, _dummies(yr, years), _dummies(df.firm.to_numpy(), firms)])
    res = sm.WLS(df.invest.to_numpy(), X, weights=w).fit()
    np.testing.assert_allclose(model.inference.estimate, res.params[:1 + len(years)], rtol=1e-8)
    np.testing.assert_allclose(model.inference.std_error, res.bse[:1 + len(years)], rtol=1e-8)
    assert model.inference.df_resid == res.df_resid
    effects = model.coding["absorbed"]["effects"]
    alpha = np.array([effects[f] for f in firms])
    np.testing.assert_allclose(alpha, res.params[1 + len(years):], rtol=1e-7)


def test_row_group_runs_of_one_file_and_the_dense_fallback(panel, tmp_path, monkeypatch):
    import tallfit.engine.levels_pass as lp

    df, table, _, _ = panel
    path = tmp_path / "one.parquet"
    pq.write_table(table, path, row_group_size=30)
    monkeypatch.setattr(lp, "SPAN_ROWS", 50)  # runs of two row groups: five parts
    model = tallfit.fit(str(path), "invest", ["value", "capital"], categorical=["firm", "year"],
                        reference={"firm": "US Steel"}, workers=2)
    X = np.column_stack([np.ones(len(df)), df.value, df.capital,
                         _dummies(df.firm.to_numpy(), sorted(set(df.firm) - {"US Steel"})),
                         _dummies(np.array(table["year"].to_pylist()), sorted(set(table["year"].to_pylist()))[:-1])])
    monkeypatch.setattr(lp, "MAX_CELLS", 40)  # parts and merges exceed it: dense factors merged
    fallback = tallfit.fit(str(path), "invest", ["value", "capital"], categorical=["firm", "year"],
                           reference={"firm": "US Steel", "year": "1954"}, workers=3)
    res = sm.OLS(df.invest.to_numpy(), X).fit()
    np.testing.assert_allclose(fallback.inference.estimate, res.params, rtol=1e-8)
    np.testing.assert_allclose(fallback.inference.std_error, res.bse, rtol=1e-8)
    assert fallback.inference.df_resid == res.df_resid == model.inference.df_resid
    assert model.terms == fallback.terms  # the default reference year is 1954 (ties: the last)
    np.testing.assert_allclose(model.inference.estimate, res.params, rtol=1e-8)


def test_parts_sharing_one_key_dictionary_hash_it_once(tmp_path, monkeypatch):
    """A key of 5,000 levels stored with one dictionary for every row group (as a writer given a
    dictionary column stores it): the parts' label tables start from the shared seed, and the fit
    still equals the within estimator computed directly (OLS on key-demeaned columns, by the
    Frisch–Waugh–Lovell theorem) and gives the same bits for 1 and 2 workers. Data invented."""
    import pyarrow as pa

    import tallfit.design.categorical as cat
    import tallfit.engine.levels_pass as lp

    rng = np.random.default_rng(5)
    n, G = 16_000, 5_000
    labels = pa.array([f"h{v:05d}" for v in range(G)])
    g = np.concatenate([np.arange(G), rng.integers(0, G, n - G)])
    x1, x2 = rng.standard_normal(n), rng.standard_normal(n)
    y = 2.0 * x1 - 0.5 * x2 + rng.standard_normal(G)[g] + 0.1 * rng.standard_normal(n)
    table = pa.table({"key": pa.DictionaryArray.from_arrays(pa.array(g, pa.int32()), labels),
                      "x1": x1, "x2": x2, "y": y})
    path = tmp_path / "keyed.parquet"
    pq.write_table(table, path, row_group_size=4_000)
    assert pq.ParquetFile(path).read_row_group(3)["key"].chunk(0).dictionary.equals(labels)
    monkeypatch.setattr(lp, "SPAN_ROWS", 4_000)  # four parts
    hashed = []
    real = cat.string_ids
    monkeypatch.setattr(cat, "string_ids", lambda off, *a: hashed.append(len(off) - 1) or real(off, *a))
    fits = []
    for w in (1, 2):
        hashed.clear()
        fits.append(tallfit.fit(str(path), "y", ["x1", "x2"], absorb="key", workers=w))
        # once per worker at most (parts starting together may both miss the seed), not per part
        # and per merge (4 + 3 times); merges match the common labels by their buffers
        assert G <= sum(hashed) <= w * G
    _same_bits(fits[0], fits[1])
    counts = np.bincount(g, minlength=G)
    demean = lambda v: v - (np.bincount(g, v, minlength=G) / counts)[g]  # noqa: E731
    X = np.column_stack([demean(x1), demean(x2)])
    beta, rss = np.linalg.lstsq(X, demean(y), rcond=None)[:2]
    np.testing.assert_allclose(fits[0].inference.estimate, beta, rtol=1e-10)
    df = n - G - 2
    se = np.sqrt(np.diag(np.linalg.inv(X.T @ X)) * rss[0] / df)
    np.testing.assert_allclose(fits[0].inference.std_error, se, rtol=1e-9)
    assert fits[0].inference.df_resid == df


def test_an_integer_key_read_in_parts_gives_the_one_stream_answer(tmp_path, monkeypatch):
    """An integer key of 3,000 levels absorbed from four parts (integer hash tables adopted in part
    order): the same bits for 1 and 2 workers, and the within estimator computed directly (OLS on
    key-demeaned columns, Frisch–Waugh–Lovell). Data invented."""
    import pyarrow as pa

    import tallfit.engine.levels_pass as lp

    rng = np.random.default_rng(8)
    n, G = 12_000, 3_000
    g = np.concatenate([rng.permutation(G), rng.integers(0, G, n - G)])
    key = 7_000_000 + 13 * g - 5 * (g % 2) * 10**6  # distinct, spread-out values
    x1, x2 = rng.standard_normal(n), rng.standard_normal(n)
    y = 1.5 * x1 + 0.25 * x2 + rng.standard_normal(G)[g] + 0.1 * rng.standard_normal(n)
    path = tmp_path / "int-keyed.parquet"
    pq.write_table(pa.table({"key": pa.array(key, pa.int64()), "x1": x1, "x2": x2, "y": y}), path,
                   row_group_size=3_000)
    monkeypatch.setattr(lp, "SPAN_ROWS", 3_000)  # four parts
    fits = [tallfit.fit(str(path), "y", ["x1", "x2"], absorb="key", workers=w) for w in (1, 2)]
    _same_bits(fits[0], fits[1])
    counts = np.bincount(g, minlength=G)
    demean = lambda v: v - (np.bincount(g, v, minlength=G) / counts)[g]  # noqa: E731
    X = np.column_stack([demean(x1), demean(x2)])
    beta = np.linalg.lstsq(X, demean(y), rcond=None)[0]
    np.testing.assert_allclose(fits[0].inference.estimate, beta, rtol=1e-10)
    assert fits[0].inference.df_resid == n - G - 2
    assert len(fits[0].coding["absorbed"]["effects"]) == G
