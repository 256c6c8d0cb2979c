"""The Gram / co-moment fast path: same answers as the stable path where it is safe, and a warning
(or, with method "auto", the stable path) where it is not."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
import statsmodels.api as sm

import tallfit
from nist_strd import STRD_DIR, load, lre
from tallfit.kernels.gram import SAFE_DIGITS, CoMoments, factor_from_comoments
from tallfit.kernels.tsqr import normalize_signs, triangular_factor_reference


def _stackloss_table() -> tuple[pa.Table, list[str]]:
    # Reference data: statsmodels.datasets.stackloss (Brownlee's stack loss plant data).
    df = sm.datasets.stackloss.load_pandas().data
    feats = ["AIRFLOW", "WATERTEMP", "ACIDCONC"]
    return pa.Table.from_pandas(df[feats + ["STACKLOSS"]], preserve_index=False), feats


@pytest.mark.parametrize("batch_rows", [1, 4, 1000])
def test_gram_equals_statsmodels_on_stackloss(batch_rows):
    table, feats = _stackloss_table()
    df = table.to_pandas()
    ref = sm.OLS(df["STACKLOSS"], sm.add_constant(df[feats])).fit()  # reference: statsmodels OLS
    r = tallfit.fit(table, "STACKLOSS", feats, method="gram", batch_rows=batch_rows)
    assert r.solver == "gram-comoment"
    assert np.allclose(r.inference.estimate, ref.params.values, rtol=1e-10, atol=0)
    assert np.allclose(r.inference.std_error, ref.bse.values, rtol=1e-9, atol=0)
    assert r.trusted_digits >= SAFE_DIGITS
    qr = tallfit.fit(table, "STACKLOSS", feats, method="qr", batch_rows=batch_rows)
    assert np.allclose(r.inference.estimate, qr.inference.estimate, rtol=1e-11, atol=0)


def test_factor_from_comoments_matches_householder():
    # reference: numpy's Householder QR of the whole matrix (R'R = A'A fixes R up to row signs)
    rng = np.random.default_rng(3)
    X = rng.normal(size=(5000, 4)) * [1.0, 50.0, 0.01, 3.0] + [1e4, -200.0, 5.0, 0.0]
    A = np.column_stack([np.ones(len(X)), X])
    cm = CoMoments.create(4)
    for part in np.array_split(X, 7):
        cm.update(np.asfortranarray(part))
    R = normalize_signs(factor_from_comoments(cm, intercept=True))
    ref = triangular_factor_reference(A)
    assert np.allclose(R, ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())
    # without an intercept the factor is of the raw columns
    R0 = normalize_signs(factor_from_comoments(cm, intercept=False))
    ref0 = triangular_factor_reference(X)
    assert np.allclose(R0, ref0, rtol=1e-9, atol=1e-9 * np.abs(ref0).max())


def test_shifted_comoments_avoid_cancellation():
    """A column with a huge mean and a tiny spread: the naive formula Σx² − n x̄² loses every digit,
    the shifted sums keep them (reference: numpy's two-pass np.cov, centred before multiplying)."""
    rng = np.random.default_rng(5)
    x = 1e9 + rng.normal(size=(20000, 2))
    cm = CoMoments.create(2)
    for part in np.array_split(x, 5):
        cm.update(np.asfortranarray(part))
    ref = np.cov(x, rowvar=False, bias=True) * len(x)
    assert np.allclose(cm.centred(), ref, rtol=1e-8)
    naive = x.T @ x - len(x) * np.outer(x.mean(0), x.mean(0))
    assert not np.allclose(naive, ref, rtol=1e-2)  # the check above can fail


def test_merge_order_and_grouping_change_only_rounding():
    rng = np.random.default_rng(11)
    parts = [np.asfortranarray(rng.normal(size=(n, 3)) + [5.0, -3.0, 100.0]) for n in (10, 1, 300, 57)]

    def state(ps):
        cm = CoMoments.create(3)
        cm.update(np.asfortranarray(np.vstack(ps)))
        return cm

    one = state(parts)
    singles = []
    for p in parts:
        c = CoMoments.create(3)
        c.update(p)
        singles.append(c)
    left = singles[0].merge(singles[1]).merge(singles[2]).merge(singles[3])
    tree = singles[3].merge(singles[2]).merge(singles[1].merge(singles[0]))
    for other in (left, tree):
        assert other.n == one.n
        assert np.allclose(other.mean(), one.mean(), rtol=1e-14)
        assert np.allclose(other.centred(), one.centred(), rtol=1e-12)


def _polynomial_table(degree: int) -> tuple[pa.Table, list[str]]:
    # The design of NIST's Wampler sets: x = 0..20 and its powers (a Vandermonde matrix).
    x = np.arange(21.0)
    cols = {f"x{d}": x**d for d in range(1, degree + 1)}
    y = sum(x**d for d in range(degree + 1))
    return pa.table({**cols, "y": y}), list(cols)


def test_gram_is_flagged_unsafe_on_a_degree_5_polynomial():
    table, feats = _polynomial_table(5)
    r = tallfit.fit(table, "y", feats, method="gram")
    assert r.solver == "gram-comoment"
    assert r.trusted_digits < SAFE_DIGITS
    assert any("Gram fast path keeps only" in w for w in r.warnings)
    auto = tallfit.fit(table, "y", feats, method="auto")
    assert auto.solver != "gram-comoment"
    assert any("stable pass" in w for w in auto.warnings)
    qr = tallfit.fit(table, "y", feats, method="qr")
    assert np.array_equal(auto.inference.estimate, qr.inference.estimate)


def test_degree_8_polynomial_is_not_called_aliased_by_the_gram_path():
    """With κ² past 1/ε the Gram factor makes x⁸ look like a combination of lower powers; the
    path must not report that as aliasing, so it falls back to the stable factor, which fits it."""
    table, feats = _polynomial_table(8)
    qr = tallfit.fit(table, "y", feats, method="qr")
    assert not qr.aliased
    for method in ("gram", "auto"):
        r = tallfit.fit(table, "y", feats, method=method)
        assert r.solver != "gram-comoment" and not r.aliased
        assert any("stable pass" in w for w in r.warnings)
        assert np.array_equal(r.inference.estimate, qr.inference.estimate)
    assert np.allclose(qr.inference.estimate, np.ones(9), rtol=1e-4)  # y = Σ x^d exactly


@pytest.mark.skipif(not STRD_DIR.is_dir(), reason=f"NIST StRD files not found at {STRD_DIR}")
@pytest.mark.parametrize("name", ["Wampler4", "Wampler5", "Filip"])
def test_gram_estimate_is_honest_on_nist(name):
    """NIST StRD certified values: when the Gram estimate promises d digits, about d are achieved."""
    c = load(name)
    table = pa.table({**c.features, "y": c.y})
    r = tallfit.fit(table, "y", list(c.features), intercept=c.intercept, method="gram")
    achieved = lre(r.inference.estimate, c.beta).min()
    assert r.trusted_digits < SAFE_DIGITS  # all three are ill-conditioned: Gram must say unsafe
    # digits are counted from 0 (an LRE below 0 is an error larger than the value: no digit)
    assert r.trusted_digits <= max(achieved, 0.0) + 1.5
    auto = tallfit.fit(table, "y", list(c.features), intercept=c.intercept, method="auto")
    assert lre(auto.inference.estimate, c.beta).min() >= 5.0  # the stable pass was used instead


def test_method_is_checked():
    table, feats = _stackloss_table()
    with pytest.raises(ValueError, match="method must be one of"):
        tallfit.fit(table, "STACKLOSS", feats, method="fast")
