"""Ridge paths from the factor against the closed form, the trace formula and brute-force CV.

References: the closed form (X_cᵀX_c + λD²)⁻¹ X_cᵀ y_c solved in 50-digit arithmetic (mpmath)
on statsmodels' longley data (Longley 1967, notoriously collinear) and stackloss (Brownlee
1965); effective df as trace(H(λ)) of the standardised design (Hastie, Tibshirani & Friedman,
Elements of Statistical Learning, eq. 3.50) by numpy; CV by numpy refits on each split.
"""

from __future__ import annotations

import mpmath
import numpy as np
import pyarrow as pa
import pytest

from tallfit.accumulate.folds import FoldPlan
from tallfit.api import validate
from tallfit.design.spec import ModelSpec
from tallfit.engine.split import accumulate_split
from tallfit.inputs import as_source
from tallfit.solve.ridge import cv_path, default_penalties, ridge_path

sm = pytest.importorskip("statsmodels.api")

LONGLEY = ("TOTEMP", ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"])
STACKLOSS = ("STACKLOSS", ["AIRFLOW", "WATERTEMP", "ACIDCONC"])


def _data(name, target, feats):
    df = getattr(sm.datasets, name).load_pandas().data
    return df[feats].to_numpy(float), df[target].to_numpy(float)


def _factor(X, y, batch_rows=5):
    table = pa.table({f"x{j}": X[:, j] for j in range(X.shape[1])} | {"y": y})
    spec = ModelSpec("y", tuple(f"x{j}" for j in range(X.shape[1])))
    return accumulate_split(as_source(table), spec, FoldPlan(), batch_rows).training()


def _closed_form_mp(X, y, lam):
    """(X_cᵀX_c + λ diag(var))⁻¹ X_cᵀ y_c and the intercept, in 50-digit arithmetic."""
    mpmath.mp.dps = 50
    n, p = X.shape
    Xm = mpmath.matrix([[mpmath.mpf(v) for v in row] for row in X])
    ym = [mpmath.mpf(v) for v in y]
    xbar = [mpmath.fsum(Xm[i, j] for i in range(n)) / n for j in range(p)]
    ybar = mpmath.fsum(ym) / n
    Xc = mpmath.matrix(n, p)
    for i in range(n):
        for j in range(p):
            Xc[i, j] = Xm[i, j] - xbar[j]
    yc = mpmath.matrix([v - ybar for v in ym])
    G = Xc.T * Xc
    for j in range(p):
        G[j, j] += mpmath.mpf(lam) * G[j, j] / (n - 1)  # λ·var_j, var with divisor n − 1
    b = mpmath.lu_solve(G, Xc.T * yc)
    a = ybar - mpmath.fsum(xbar[j] * b[j] for j in range(p))
    return np.array([float(a)] + [float(v) for v in b])


@pytest.mark.parametrize("case", [("longley",) + LONGLEY, ("stackloss",) + STACKLOSS])
@pytest.mark.parametrize("lam", [1e-3, 0.5, 20.0, 3e3])
def test_ridge_equals_closed_form_in_high_precision(case, lam):
    X, y = _data(*case)
    acc = _factor(X, y)
    sol = ridge_path(acc.R, acc.n_used, [lam])
    ref = _closed_form_mp(X, y, lam)  # mpmath, 50 digits
    tol = 1e-9
    np.testing.assert_allclose(sol.coef[0], ref, rtol=tol)


def test_effective_df_equals_trace_of_hat_matrix():
    X, y = _data("longley", *LONGLEY)
    acc = _factor(X, y)
    lams = np.geomspace(1e-3, 1e4, 9)
    sol = ridge_path(acc.R, acc.n_used, lams)
    Z = (X - X.mean(0)) / X.std(0, ddof=1)
    for lam, df in zip(lams, sol.df):
        H = Z @ np.linalg.solve(Z.T @ Z + lam * np.eye(Z.shape[1]), Z.T)  # hat matrix of the centred part
        np.testing.assert_allclose(df, np.trace(H), rtol=1e-9)
    assert np.all(np.diff(sol.df) < 0)  # property: df falls as the penalty grows


def test_cv_path_equals_numpy_refits_with_training_scales():
    X, y = _data("fair", "affairs", ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"])
    table = pa.table({f"x{j}": X[:, j] for j in range(X.shape[1])} | {"y": y})
    spec = ModelSpec("y", tuple(f"x{j}" for j in range(X.shape[1])))
    plan = FoldPlan(folds=5, seed=9)
    accs = accumulate_split(as_source(table), spec, plan, batch_rows=400)
    lams = [0.1, 30.0, 3000.0, 3e5]
    pcv = cv_path(accs.training_factors(), accs.folds, lams)
    _, fold = plan.assign({}, np.arange(len(y)))
    for j in range(5):
        tr = fold != j
        Xt, yt = X[tr], y[tr]
        xm, sd = Xt.mean(0), Xt.std(0, ddof=1)
        Xc = Xt - xm
        for li, lam in enumerate(lams):
            b = np.linalg.solve(Xc.T @ Xc + lam * np.diag(sd**2), Xc.T @ (yt - yt.mean()))  # numpy refit
            a = yt.mean() - xm @ b
            ref = np.mean((y[~tr] - a - X[~tr] @ b) ** 2)
            np.testing.assert_allclose(pcv.fold_mse[j, li], ref, rtol=1e-9)
    # the one-standard-error rule: a penalty at least the best, with mean within one SE of the minimum
    assert lams[pcv.one_se] >= lams[pcv.best]
    assert pcv.mean[pcv.one_se] <= pcv.mean[pcv.best] + pcv.se[pcv.best]


def test_default_grid_spans_nearly_none_to_nearly_all_shrinkage():
    X, y = _data("stackloss", *STACKLOSS)
    acc = _factor(X, y)
    sol = ridge_path(acc.R, acc.n_used, default_penalties(acc.R, acc.n_used, 50))
    assert sol.df[0] > 2.99 and sol.df[-1] < 0.01
    assert np.abs(sol.coef[-1, 1:]).max() < 1e-2 * np.abs(sol.coef[0, 1:]).max()


def test_chosen_ridge_model_is_a_normal_model_file(tmp_path):
    X, y = _data("fair", "affairs", ["rate_marriage", "age", "yrs_married"])
    table = pa.table({"a": X[:, 0], "b": X[:, 1], "c": X[:, 2], "y": y})
    rep = validate(table, "y", ["a", "b", "c"], folds=5, ridge="auto", ridge_rule="1se")
    model = rep.ridge.chosen_fit
    from tallfit.api import load, predict

    model.save(tmp_path / "m.json")
    back = load(tmp_path / "m.json")
    assert back.options["ridge"]["penalty"] == float(rep.ridge.penalties[rep.ridge.one_se])
    pred = predict(back, table).column("prediction").to_numpy()
    np.testing.assert_allclose(pred, np.column_stack([np.ones(len(y)), X]) @ model.inference.estimate, rtol=1e-12)
