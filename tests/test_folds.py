"""Holdout and k-fold cross-validation from per-fold factors, against brute-force refits.

References: numpy.linalg.lstsq refits on each training split, evaluated on the held-out rows
(data: statsmodels.datasets fair, Fair 1978; grunfeld, the firm-year investment panel, grouped
by firm). Agreement is asked to 1e-9 relative.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from tallfit.api import validate
from tallfit.accumulate.folds import FoldPlan, key_codes
from tallfit.design.spec import ModelSpec
from tallfit.engine.split import accumulate_split
from tallfit.errors import DesignError
from tallfit.inputs import as_source

sm = pytest.importorskip("statsmodels.api")

FAIR = ("affairs", ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"])
RTOL = 1e-9


def _fair():
    df = sm.datasets.fair.load_pandas().data
    target, feats = FAIR
    table = pa.table({c: df[c].to_numpy(float) for c in feats + [target]})
    X = sm.add_constant(df[feats].to_numpy(float), prepend=True)
    return table, X, df[target].to_numpy(float)


def _grunfeld():
    df = sm.datasets.grunfeld.load_pandas().data
    table = pa.table({"invest": df["invest"].to_numpy(float), "value": df["value"].to_numpy(float),
                      "capital": df["capital"].to_numpy(float), "firm": df["firm"].astype(str).to_numpy()})
    X = sm.add_constant(df[["value", "capital"]].to_numpy(float), prepend=True)
    return table, X, df["invest"].to_numpy(float), df["firm"].astype(str).to_numpy()


def _brute_cv(X, y, fold):
    """numpy lstsq on each training split, MSE on its held-out rows (the reference)."""
    out = []
    for j in np.unique(fold):
        tr = fold != j
        b = np.linalg.lstsq(X[tr], y[tr], rcond=None)[0]
        out.append(np.mean((y[~tr] - X[~tr] @ b) ** 2))
    return np.array(out)


@pytest.mark.parametrize("batch_rows", [97, 100_000])
def test_cv_equals_lstsq_refits_plain_folds(batch_rows):
    table, X, y = _fair()
    plan = FoldPlan(folds=7, seed=11)
    rep = validate(table, FAIR[0], FAIR[1], folds=7, seed=11, batch_rows=batch_rows)
    _, fold = plan.assign({}, np.arange(len(y)))
    np.testing.assert_allclose(rep.cv.fold_mse, _brute_cv(X, y, fold), rtol=RTOL)  # numpy lstsq refits
    assert rep.cv.fold_n.sum() == len(y)


def test_cv_equals_lstsq_refits_grouped_folds():
    table, X, y, firm = _grunfeld()
    rep = validate(table, "invest", ["value", "capital"], folds=4, fold_key="firm", seed=3,
                               batch_rows=13)
    _, fold = FoldPlan(folds=4, fold_key="firm", seed=3).assign({"firm": pa.array(firm)}, np.arange(len(y)))
    for f in np.unique(firm):  # grouping: every row of one firm in one fold
        assert np.unique(fold[firm == f]).size == 1
    ref = _brute_cv(X, y, fold)  # numpy lstsq refits
    np.testing.assert_allclose(rep.cv.fold_mse[rep.cv.fold_n > 0], ref, rtol=RTOL)


def test_holdout_error_and_mae_equal_refit():
    table, X, y = _fair()
    rep = validate(table, FAIR[0], FAIR[1], folds=0, holdout=0.25, seed=5, mae=True, batch_rows=1000)
    hold, _ = FoldPlan(holdout=0.25, seed=5).assign({}, np.arange(len(y)))
    b = np.linalg.lstsq(X[~hold], y[~hold], rcond=None)[0]  # numpy lstsq on the training rows
    e = y[hold] - X[hold] @ b
    h = rep.holdout.to_dict()
    assert rep.holdout.n == hold.sum()
    np.testing.assert_allclose(h["mse"], np.mean(e**2), rtol=RTOL)
    np.testing.assert_allclose(h["mae"], np.mean(np.abs(e)), rtol=RTOL)
    np.testing.assert_allclose(h["r_squared"], 1 - np.sum(e**2) / np.sum((y[hold] - y[hold].mean()) ** 2), rtol=RTOL)
    np.testing.assert_allclose(rep.fit.inference.estimate, b, rtol=1e-9)
    assert abs(hold.mean() - 0.25) < 0.03  # property: the fraction is honoured


def test_assignment_is_deterministic_and_batch_invariant():
    table, _, y = _fair()
    spec = ModelSpec(FAIR[0], tuple(FAIR[1]))
    plan = FoldPlan(folds=5, seed=2)
    a = accumulate_split(as_source(table), spec, plan, batch_rows=50)
    b = accumulate_split(as_source(table), spec, plan, batch_rows=6366)
    assert [f.n_used for f in a.folds] == [f.n_used for f in b.folds]
    other = accumulate_split(as_source(table), spec, FoldPlan(folds=5, seed=3), batch_rows=50)
    assert [f.n_used for f in a.folds] != [f.n_used for f in other.folds]


def test_key_codes_equal_values_equal_codes_across_types():
    s = pa.array(["h1", "h22", None, "h1", ""])
    d = s.dictionary_encode()
    cs, cd = key_codes(s, "k"), key_codes(d, "k")
    assert cs[0] == cs[3] and cs[0] != cs[1] and cs[4] != cs[0]
    np.testing.assert_array_equal(cs[[0, 1, 3, 4]], cd[[0, 1, 3, 4]])
    ints = key_codes(pa.array([5, 6, 5]), "k")
    assert ints[0] == ints[2] != ints[1]
    sliced = key_codes(s.slice(3), "k")
    assert sliced[0] == cs[0]


def test_training_factors_are_merges_of_the_other_folds():
    table, X, y = _fair()
    spec = ModelSpec(FAIR[0], tuple(FAIR[1]))
    accs = accumulate_split(as_source(table), spec, FoldPlan(folds=4, seed=1), batch_rows=500)
    A = np.column_stack([X, y])
    _, fold = FoldPlan(folds=4, seed=1).assign({}, np.arange(len(y)))
    for j, t in enumerate(accs.training_factors()):
        ref = A[fold != j]
        np.testing.assert_allclose(t.R.T @ t.R, ref.T @ ref, rtol=1e-10)  # R'R = A'A of the training rows
        assert t.n_used == ref.shape[0]


def test_bad_plans_are_rejected_with_a_reason():
    with pytest.raises(DesignError, match="at least 2"):
        FoldPlan(folds=1)
    with pytest.raises(DesignError, match="holdout fraction"):
        FoldPlan(holdout=1.5)


def test_cv_with_a_categorical_term_equals_refits():
    """Each fold is recoded with the training rows' coding; predictions do not depend on the reference."""
    table, X, y, firm = _grunfeld()
    rep = validate(table, "invest", ["value", "capital"], categorical=["firm"], folds=4, seed=8, holdout=0.2,
                   batch_rows=17)
    levels = np.unique(firm)
    D = np.column_stack([X] + [(firm == f).astype(float) for f in levels[1:]])
    hold, fold = FoldPlan(folds=4, holdout=0.2, seed=8).assign({}, np.arange(len(y)))
    ref = _brute_cv(D[~hold], y[~hold], fold[~hold])  # numpy lstsq refits with indicator columns
    np.testing.assert_allclose(rep.cv.fold_mse, ref, rtol=RTOL)
    b = np.linalg.lstsq(D[~hold], y[~hold], rcond=None)[0]
    np.testing.assert_allclose(rep.holdout.mse, np.mean((y[hold] - D[hold] @ b) ** 2), rtol=RTOL)


def test_cv_from_parquet_parts_on_every_core_equals_refits(tmp_path, monkeypatch):
    """Two Parquet files of many row groups, split into parts read in parallel: rows keep their
    scan positions, so folds and holdout are those of a serial pass (numpy lstsq refits)."""
    import pyarrow.parquet as pq

    import tallfit.engine.parallel as parallel

    monkeypatch.setattr(parallel, "SPAN_ROWS", 700)
    table, X, y = _fair()
    half = table.num_rows // 2
    paths = []
    for i, part in enumerate((table.slice(0, half), table.slice(half))):
        paths.append(str(tmp_path / f"fair-{i}.parquet"))
        pq.write_table(part, paths[-1], row_group_size=333)
    assert len(parallel.source_parts(as_source(paths))) > 4
    plan = FoldPlan(folds=5, seed=2, holdout=0.2)
    rep = validate(paths, FAIR[0], FAIR[1], folds=5, holdout=0.2, seed=2, batch_rows=128)
    holdout, fold = plan.assign({}, np.arange(len(y)))
    train = ~holdout
    np.testing.assert_allclose(rep.cv.fold_mse, _brute_cv(X[train], y[train], fold[train]), rtol=RTOL)
    b = np.linalg.lstsq(X[train], y[train], rcond=None)[0]  # numpy lstsq on the training rows
    np.testing.assert_allclose(rep.holdout.mse, np.mean((y[holdout] - X[holdout] @ b) ** 2), rtol=RTOL)


def test_route_rows_equals_a_stable_sort_with_group_ranges():
    from tallfit.kernels.gather import route_rows

    rng = np.random.default_rng(4)
    A = np.asfortranarray(rng.normal(size=(500, 7)))
    groups = rng.integers(0, 4, 500)
    groups[groups == 2] = 3  # an empty group
    S, starts, lo, hi = route_rows(A, groups, 5)
    order = np.argsort(groups, kind="stable")  # numpy's stable sort as the reference
    assert S.flags.f_contiguous and np.array_equal(S, A[order])
    assert np.array_equal(starts, np.searchsorted(groups[order], np.arange(6)))
    for g in (0, 1, 3):
        assert np.array_equal(lo[g], A[groups == g].min(axis=0)) and np.array_equal(hi[g], A[groups == g].max(axis=0))
    with pytest.raises(IndexError):
        route_rows(A, groups, 3)
