"""Term selection and nested F tests from the factor, against statsmodels refits and enumeration.

References: statsmodels OLS refits (rss, aic, bic, rsquared_adj) of every subset, brute-force
enumeration for the best subset of each size; statsmodels' OLSResults.compare_f_test and
anova_lm(typ=1) for nested tests. Data: statsmodels.datasets statecrime and fair.
"""

from __future__ import annotations

import itertools

import numpy as np
import pyarrow as pa
import pytest

from tallfit.accumulate.folds import FoldPlan
from tallfit.design.spec import ModelSpec
from tallfit.engine.split import accumulate_split
from tallfit.inputs import as_source
from tallfit.solve.nested import nested_f_test, sequential_table
from tallfit.solve.selection import best_subsets, select, subset_rss

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.anova import anova_lm  # noqa: E402

STATE = ("murder", ["hs_grad", "poverty", "single", "white", "urban"])
FAIR = ("affairs", ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"])


def _setup(name, target, feats, folds=0):
    df = getattr(sm.datasets, name).load_pandas().data
    table = pa.table({c: df[c].to_numpy(float) for c in feats + [target]})
    accs = accumulate_split(as_source(table), ModelSpec(target, tuple(feats)), FoldPlan(folds=folds, seed=4), 7)
    return df, accs


def _refit(df, target, terms):
    X = sm.add_constant(df[list(terms)].to_numpy(float), prepend=True, has_constant="add")
    return sm.OLS(df[target].to_numpy(float), X).fit()


def test_best_subset_equals_enumeration_with_statsmodels_refits():
    df, accs = _setup("statecrime", *STATE)
    acc = accs.training()
    feats = STATE[1]
    best, nodes = best_subsets(acc.R, [0], list(range(1, 6)))
    for size in range(1, 6):
        fits = {c: _refit(df, STATE[0], [feats[i - 1] for i in c]).ssr
                for c in itertools.combinations(range(1, 6), size)}  # statsmodels refit of each subset
        want = min(fits, key=fits.get)
        assert sorted(best[size][1]) == list(want)
        np.testing.assert_allclose(best[size][0], fits[want], rtol=1e-9)
    assert nodes <= 2**5


@pytest.mark.parametrize("criterion", ["aic", "bic", "adj_r2"])
def test_selected_model_and_scores_match_statsmodels(criterion):
    df, accs = _setup("statecrime", *STATE)
    acc = accs.training()
    names = acc.names
    sel = select(acc.R, acc.n_used, names, True, "best", criterion)
    attr = {"aic": "aic", "bic": "bic", "adj_r2": "rsquared_adj"}[criterion]
    scores = {}
    for size in range(0, 6):
        for c in itertools.combinations(STATE[1], size):
            r = _refit(df, STATE[0], c)
            scores[c] = r.rsquared_adj * -1 if criterion == "adj_r2" else getattr(r, attr)
    want = min(scores, key=scores.get)
    got = tuple(n for n in (names[i] for i in sel.chosen.cols) if n != "(intercept)")
    assert set(got) == set(want)
    ref = _refit(df, STATE[0], got)
    np.testing.assert_allclose(sel.chosen.scores[criterion], getattr(ref, attr), rtol=1e-9)
    # every step of the path carries the refit's AIC and BIC
    for cand in sel.path:
        r = _refit(df, STATE[0], [names[i] for i in cand.cols if i != 0])
        np.testing.assert_allclose([cand.scores["aic"], cand.scores["bic"]], [r.aic, r.bic], rtol=1e-9)


@pytest.mark.parametrize("method", ["forward", "backward"])
def test_stepwise_matches_a_statsmodels_driven_search(method):
    df, accs = _setup("fair", *FAIR)
    acc = accs.training()
    sel = select(acc.R, acc.n_used, acc.names, True, method, "bic")
    chosen = [] if method == "forward" else list(FAIR[1])
    current = _refit(df, FAIR[0], chosen).bic
    while True:  # the same greedy search with statsmodels refits
        moves = [chosen + [f] for f in FAIR[1] if f not in chosen] if method == "forward" else \
            [[c for c in chosen if c != f] for f in chosen]
        if not moves:
            break
        bics = [_refit(df, FAIR[0], m).bic for m in moves]
        if min(bics) >= current:
            break
        chosen, current = moves[int(np.argmin(bics))], min(bics)
    got = {acc.names[i] for i in sel.chosen.cols if i != 0}
    assert got == set(chosen)
    np.testing.assert_allclose(sel.chosen.scores["bic"], current, rtol=1e-9)


def test_branch_and_bound_equals_exhaustive_on_twelve_columns():
    """Property test on invented data: the bounded search finds every size's least RSS."""
    rng = np.random.default_rng(3)
    n, p = 400, 12
    Z = rng.standard_normal((n, p)) + 0.6 * rng.standard_normal((n, 1))
    y = Z[:, :4] @ [1.0, -0.5, 0.3, 0.2] + rng.standard_normal(n)
    A = np.column_stack([np.ones(n), Z, y])
    R = np.linalg.qr(A, mode="r")
    pool = list(range(1, p + 1))
    best, nodes = best_subsets(R, [0], pool)
    for size in (3, 6, 9):
        ref = min(subset_rss(R, [0] + list(c)) for c in itertools.combinations(pool, size))
        np.testing.assert_allclose(best[size][0], ref, rtol=1e-10)
    assert nodes < 2**p  # the bound cut part of the tree


def test_nested_f_equals_compare_f_test():
    df, accs = _setup("fair", *FAIR)
    acc = accs.training()
    t = nested_f_test(acc.R, acc.n_used, acc.names, ["(intercept)", "age", "yrs_married"], ["educ", "children"])
    small = _refit(df, FAIR[0], ["age", "yrs_married"])
    large = _refit(df, FAIR[0], ["age", "yrs_married", "children", "educ"])
    f, p, ddf = large.compare_f_test(small)  # statsmodels
    np.testing.assert_allclose([t.f_statistic, t.p_value], [f, p], rtol=1e-9)
    assert t.df_base - t.df_full == ddf


def test_sequential_table_equals_anova_type_1():
    df, accs = _setup("statecrime", *STATE)
    acc = accs.training()
    rows = sequential_table(acc.R, acc.n_used, acc.names, True)
    import statsmodels.formula.api as smf

    formula = f"{STATE[0]} ~ " + " + ".join(STATE[1])
    ref = anova_lm(smf.ols(formula, data=df).fit(), typ=1)  # statsmodels, type I sums of squares
    np.testing.assert_allclose([r["sum_sq"] for r in rows], ref["sum_sq"].to_numpy(), rtol=1e-9)
    np.testing.assert_allclose([r["p_value"] for r in rows[:-1]], ref["PR(>F)"].to_numpy()[:-1], rtol=1e-8)


def test_selection_by_cv_uses_fold_errors():
    df, accs = _setup("fair", *FAIR, folds=5)
    acc = accs.training()
    folds = (accs.training_factors(), accs.folds)
    sel = select(acc.R, acc.n_used, acc.names, True, "forward", "cv", folds)
    cvs = [c.scores["cv"] for c in sel.path]
    assert all(b < a for a, b in zip(cvs, cvs[1:]))  # property: each step lowered the CV error


@pytest.mark.parametrize("method", ["best", "forward", "backward"])
def test_a_categorical_enters_and_leaves_as_one_term(method):
    """Fair's occupation (6 levels) is one candidate term: the chosen model equals the BIC-best
    subset of terms from statsmodels refits with occupation as dummy columns (best subset), and
    no search splits its indicator columns."""
    df = sm.datasets.fair.load_pandas().data
    target, feats = "affairs", ["rate_marriage", "age", "yrs_married", "religious"]
    occ = df["occupation"].astype(int).astype(str).to_numpy()
    table = pa.table({**{c: df[c].to_numpy(float) for c in feats + [target]}, "occupation": occ})
    spec = ModelSpec(target, tuple(feats), categorical=("occupation",))
    from tallfit.engine.split import finalize_split

    accs, _ = finalize_split(accumulate_split(as_source(table), spec, FoldPlan(folds=0, seed=1), 997), spec)
    acc = accs.training()
    names = acc.names
    sel = select(acc.R, acc.n_used, names, True, method, "bic", categorical=("occupation",))
    chosen = {names[i] for i in sel.chosen.cols}
    indicators = {n for n in names if n.startswith("occupation[")}
    assert indicators <= chosen or not (indicators & chosen)  # all of them or none
    for cand in sel.path:
        picked = {names[i] for i in cand.cols}
        assert indicators <= picked or not (indicators & picked)
    if method != "best":
        return
    dummies = pd_dummies(occ, acc, names)
    terms = feats + ["occupation"]
    bics = {}
    for size in range(len(terms) + 1):
        for combo in itertools.combinations(terms, size):  # statsmodels refit of every subset of terms
            cols = [df[c].to_numpy(float)[:, None] for c in combo if c != "occupation"]
            if "occupation" in combo:
                cols.append(dummies)
            X = np.hstack([np.ones((len(df), 1))] + cols)
            bics[combo] = sm.OLS(df[target].to_numpy(float), X).fit().bic
    want = min(bics, key=bics.get)
    got = {n for n in chosen if n != "(intercept)" and not n.startswith("occupation[")}
    if indicators <= chosen:
        got.add("occupation")
    assert got == set(want)
    np.testing.assert_allclose(sel.chosen.scores["bic"], bics[want], rtol=1e-9)


def pd_dummies(values, acc, names):
    """Indicator columns of the levels tallfit kept (same reference level), from the raw labels."""
    levels = [n[len("occupation["):-1] for n in names if n.startswith("occupation[")]
    return np.column_stack([(values == lv).astype(float) for lv in levels])
