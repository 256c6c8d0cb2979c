"""Iterative solvers (gd, cg, lbfgs) against external references and their own theory.

References: statsmodels OLS on the Fair (1978) affairs data that statsmodels ships; numpy's
LAPACK least squares (numpy.linalg.lstsq) and eigen-decomposition (numpy.linalg.eigh);
scipy.sparse.linalg.lsqr (Paige & Saunders 1982) and scipy.optimize's L-BFGS-B on the same
in-memory matrix; the linear rate of gradient descent on a quadratic (Nesterov 2004, §2.1.5).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from scipy.optimize import minimize
from scipy.sparse.linalg import lsqr

import tallfit
from tallfit.errors import NumericalError, TallfitError

sm = pytest.importorskip("statsmodels.api")

FAIR_X = ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]


@pytest.fixture(scope="module")
def fair():
    df = sm.datasets.fair.load_pandas().data
    table = pa.table({c: df[c].to_numpy(dtype=float) for c in FAIR_X + ["affairs"]})
    X = sm.add_constant(df[FAIR_X].to_numpy(dtype=float), prepend=True)
    return table, X, df["affairs"].to_numpy(dtype=float)


def _rel_gap(b, X, y):
    ref = np.linalg.lstsq(X, y, rcond=None)[0]  # reference: LAPACK least squares
    d = X @ (b - ref)
    return float(d @ d) / float(np.sum((X @ ref - y) ** 2))


@pytest.mark.parametrize("solver", ["cg", "lbfgs"])
def test_cg_and_lbfgs_reach_1e10_and_agree_with_statsmodels(fair, solver):
    table, X, y = fair
    model = tallfit.fit(table, "affairs", FAIR_X, solver=solver, batch_rows=1000)
    b = model.inference.estimate
    assert _rel_gap(b, X, y) < 1e-10
    ref = sm.OLS(y, X).fit()  # reference: statsmodels OLS
    np.testing.assert_allclose(b, ref.params, rtol=1e-6, atol=0)
    np.testing.assert_allclose(model.inference.std_error, ref.bse, rtol=1e-6)
    assert model.iterations["final_relative_gap"] < 1e-10
    assert model.solver == f"iterative-{solver}"


def test_cg_matches_scipy_lsqr_on_the_same_matrix(fair):
    table, X, y = fair
    ours = tallfit.fit(table, "affairs", FAIR_X, solver="cg", solver_options={"standardize": False, "max_passes": 300},
                       batch_rows=777).inference.estimate
    ref = lsqr(X, y, atol=1e-15, btol=1e-15, iter_lim=5000)[0]  # reference: scipy.sparse.linalg.lsqr
    np.testing.assert_allclose(ours, ref, rtol=1e-7)


def test_lbfgs_matches_scipy_lbfgs_on_the_same_matrix(fair):
    table, X, y = fair
    n = len(y)
    ours = tallfit.fit(table, "affairs", FAIR_X, solver="lbfgs", batch_rows=2048).inference.estimate

    def f(b):  # reference: scipy.optimize L-BFGS-B on the whole in-memory matrix
        r = X @ b - y
        return 0.5 * r @ r / n, X.T @ r / n

    ref = minimize(f, np.zeros(X.shape[1]), jac=True, method="L-BFGS-B",
                   options={"ftol": 1e-16, "gtol": 1e-12, "maxiter": 20000}).x
    np.testing.assert_allclose(ours, ref, rtol=1e-5)


def test_gradient_descent_rate_lies_between_theory_bounds():
    # Property test on an invented ill-conditioned design; rates from eigh of the exact Gram matrix.
    rng = np.random.default_rng(3)
    n = 4000
    z = rng.normal(size=(n, 3))
    X = np.column_stack([np.ones(n), 5 + z[:, 0], 0.3 * z[:, 1] + z[:, 0], 3 * z[:, 2]])
    y = X @ [1.0, -2.0, 0.5, 0.25] + rng.normal(size=n)
    table = pa.table({"a": X[:, 1], "b": X[:, 2], "c": X[:, 3], "y": y})
    iters = 60
    model = tallfit.fit(table, "y", ["a", "b", "c"], solver="gd",
                        solver_options={"standardize": False, "max_passes": iters, "tol": 0.0})
    lam, V = np.linalg.eigh(X.T @ X / n)  # reference: LAPACK symmetric eigen-decomposition
    L, mu = lam[-1], lam[0]
    q = 1.0 - mu / L
    assert L / mu > 1e3  # ill-conditioned indeed
    beta = np.linalg.lstsq(X, y, rcond=None)[0]
    coords = V.T @ (0.0 - beta)  # error of b0 = 0 in the eigenbasis
    steps = [s for s in model.iterations["history"] if s["label"].startswith("iteration")]
    assert len(steps) == iters
    gap0 = n * float(np.sum(lam * coords**2))
    for k, s in enumerate(steps, start=1):
        predicted = n * float(np.sum(lam * coords**2 * (1 - lam / L) ** (2 * k)))
        slowest = n * lam[0] * coords[0] ** 2 * q ** (2 * k)
        assert s["loss_gap"] <= q ** (2 * k) * gap0 * (1 + 1e-8)  # no slower than the guarantee
        assert s["loss_gap"] >= slowest * (1 - 1e-6)  # no faster than the slowest mode allows
        np.testing.assert_allclose(s["loss_gap"], predicted, rtol=1e-6)


def test_gradient_descent_over_large_step_is_reported(fair):
    table, _, _ = fair
    with pytest.raises(NumericalError, match=r"diverged.*step_scale ≤ 1.*standardi") as info:
        tallfit.fit(table, "affairs", FAIR_X, solver="gd", solver_options={"step_scale": 3.0})
    assert isinstance(info.value, TallfitError)


def test_unknown_solver_and_option_are_clear_errors(fair):
    table, _, _ = fair
    with pytest.raises(TallfitError, match="unknown solver 'newton'"):
        tallfit.fit(table, "affairs", FAIR_X, solver="newton")
    with pytest.raises(TallfitError, match="unknown option.*epochs.*solver cg"):
        tallfit.fit(table, "affairs", FAIR_X, solver="cg", solver_options={"epochs": 3})


def test_iterative_model_saves_loads_and_predicts(fair, tmp_path):
    table, X, y = fair
    model = tallfit.fit(table, "affairs", FAIR_X, solver="lbfgs")
    path = tmp_path / "m.json"
    tallfit.save(model, path)
    back = tallfit.load(path)
    assert back.to_dict() == model.to_dict()
    assert back.iterations["stop_reason"] == model.iterations["stop_reason"]
    pred = tallfit.predict(back, table).column("prediction").to_numpy()
    np.testing.assert_allclose(pred, X @ model.inference.estimate, rtol=1e-12)  # predictions = Xβ
    assert any("least-squares formulas evaluated at these coefficients" in w for w in back.warnings)
    assert "iterative-lbfgs" in back.summary()
