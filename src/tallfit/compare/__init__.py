"""Closed-form vs iterative: run the exact fit and iterative solvers on the same data, measure
each against the exact optimum per pass (``run``), tabulate and read the result (``report``).
Plots are drawn by ``tallfit.render.compare_plots``."""

from tallfit.compare.run import Comparison, compare

__all__ = ["Comparison", "compare"]
