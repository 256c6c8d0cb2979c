"""Residual diagnostics from the second pass (tallfit.engine.second_pass), one job per module.

* ``kernels``: numba kernels (grid binning, cluster score sums, residual moments) with numpy
  references;
* ``bins``: binned residual sums per feature and fitted value, coarsened to quantile-like bins;
* ``residuals``: the residual sketch (MAE, quantiles, histogram, normal comparison), top-k rows;
* ``heteroskedasticity``: Breusch–Pagan in Koenker's form;
* ``curvature``: the binned-means-against-a-line test and its flag;
* ``advice``: plain-words advice; ``assemble``: everything as one JSON-ready dict.
"""
