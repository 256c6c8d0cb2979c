"""diagnostics/multiple_tests.py: Holm's adjusted p-values against statsmodels' multipletests
(method "holm"), and the published definition on a small worked case (Holm 1979)."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from tallfit.diagnostics.multiple_tests import holm


@pytest.mark.parametrize("seed", range(6))
def test_holm_equals_statsmodels(seed):
    rng = np.random.default_rng(seed)
    p = rng.uniform(0, 1, 1 + seed * 7) ** 3  # many small values, some ties below
    p[:2] = p[0]
    np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1], rtol=1e-15)


def test_holm_worked_case_and_missing_values():
    # three tests: 0.01·3 = 0.03, then max(0.03, 0.02·2) = 0.04, then max(0.04, 0.04·1) = 0.04
    np.testing.assert_allclose(holm([0.04, 0.01, 0.02]), [0.04, 0.03, 0.04])
    out = holm([0.01, np.nan, 0.02])  # NaN stays NaN and is not one of the m tests
    assert np.isnan(out[1])
    np.testing.assert_allclose(out[[0, 2]], [0.02, 0.02])
    assert holm([]).size == 0 and np.isnan(holm([np.nan])).all()
