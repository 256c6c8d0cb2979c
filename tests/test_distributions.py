"""tallfit.solve.distributions against scipy.stats (the reference library): the same values for
t, F, χ² tail probabilities and t / normal quantiles, NaN where the degrees of freedom are not
positive; and the start-up import no longer pulls in scipy.stats (nor polars)."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
from scipy import stats

from tallfit.solve import distributions as d


def test_equal_scipy_stats():
    x = np.array([-40.0, -3.0, -0.5, 0.0, 0.7, 2.0, 5.0, 60.0])
    for df in (1, 2.5, 7, 30, 1e6, np.inf):
        np.testing.assert_array_equal(d.t_sf(x, df), stats.t.sf(x, df))
        np.testing.assert_array_equal(d.t_ppf([0.001, 0.5, 0.975], df), stats.t.ppf([0.001, 0.5, 0.975], df))
    y = np.abs(x)
    for a, b in ((1, 1), (3, 10), (12.5, 4000)):
        np.testing.assert_allclose(d.f_sf(y, a, b), stats.f.sf(y, a, b), rtol=1e-15, atol=0)
    for df in (1, 4, 33.5):
        np.testing.assert_allclose(d.chi2_sf(y, df), stats.chi2.sf(y, df), rtol=1e-15, atol=0)
    p = np.array([1e-9, 0.025, 0.5, 0.9])
    np.testing.assert_array_equal(d.norm_ppf(p), stats.norm.ppf(p))
    np.testing.assert_allclose(d.norm_pdf(x, 0.3, 2.0), stats.norm.pdf(x, 0.3, 2.0), rtol=1e-15)
    for f, args in ((d.t_sf, (1.0, 3)), (d.t_ppf, (0.9, 3)), (d.f_sf, (1.0, 2, 3)), (d.chi2_sf, (1.0, 2))):
        assert isinstance(f(*args), np.float64)  # a scalar, as scipy.stats returns, not a 0-d array
    for bad in (0, -1.0):
        assert np.isnan(d.t_sf(1.0, bad)) and np.isnan(stats.t.sf(1.0, bad))
        assert np.isnan(d.f_sf(1.0, 2, bad)) and np.isnan(d.chi2_sf(1.0, bad))


def test_command_start_does_not_import_scipy_stats_or_polars():
    """scipy.stats (≈ 0.6 s here) is not needed; polars (≈ 0.2 s) only once a CSV or JSON lines
    file is opened or an SQL term is compiled."""
    code = ("import sys, tallfit.api, tallfit.cli.fit, tallfit.cli.report; "
            "print('scipy.stats' in sys.modules, 'polars' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False False", out.stderr
