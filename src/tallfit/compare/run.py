"""Run the exact fit and chosen iterative solvers on one data set and one model specification.

The exact fit makes the first pass (timed as the exact solver's cost); every iterative solver
starts from that same factor (its standardisation, step bound and exact-loss monitor) and then
streams the data once per iteration or epoch through one shared :class:`DesignPasses` (so a
cache, when asked, is written once and replayed by every later pass). Each solver's seconds and
passes include that first pass, since it needs it. The training-loss gap of every iterate is
exact (‖Xb − y‖² − RSS = ‖R11 b − r12‖², no pass); with a holdout set, its factor (one pass)
gives the holdout mean squared error of every iterate the same way.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from tallfit.design.design import Design
from tallfit.engine import local
from tallfit.engine.cache import DesignPasses
from tallfit.engine.local import DEFAULT_BATCH_ROWS
from tallfit.errors import DesignError, NumericalError
from tallfit.inputs import as_source
from tallfit.results import FitResult
from tallfit.solve.iterative.driver import LABELS, SOLVERS, check_solver, check_spec, prepare, run_solver
from tallfit.solve.iterative.stopping import RunResult

DEFAULT_SOLVERS = ("gd", "cg", "lbfgs", "sgd")
THRESHOLDS = (1e-2, 1e-4, 1e-6)


@dataclass
class SolverRun:
    name: str
    run: RunResult | None = None
    error: str | None = None  # the divergence message when it diverged

    @property
    def label(self) -> str:
        return LABELS[self.name]


@dataclass
class Comparison:
    """The exact fit, the iterative runs, and what they were measured against."""

    exact: FitResult
    exact_seconds: float
    runs: list[SolverRun]
    thresholds: tuple[float, ...] = THRESHOLDS
    cache: dict = field(default_factory=dict)
    holdout: dict | None = None
    exact_holdout_mse: float | None = None


def _holdout_factor(holdout, exact: FitResult, batch_rows: int, format, delimiter):
    src = as_source(holdout, format=format, delimiter=delimiter)
    design = Design(exact.spec, coding=exact.coding)
    acc = local.accumulate(src, exact.spec, batch_rows, None, design=design)
    if acc.names != exact.accumulator.names:
        raise DesignError(f"the holdout data {src.describe()} gives design columns {acc.names[:-1]}, the "
                          f"model {exact.accumulator.names[:-1]}; use holdout data with the same columns and levels")
    if acc.n_used == 0:
        raise DesignError(f"the holdout data {src.describe()} has no usable rows")
    return acc, src.describe()


def compare(
    data: Any,
    target: str,
    features: Sequence[str],
    *,
    solvers: Sequence[str] = DEFAULT_SOLVERS,
    solver_options: dict[str, dict[str, Any]] | None = None,
    standardize: bool = True,
    holdout: Any = None,
    cache: bool = False,
    spill_dir: str | None = None,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    format: str | None = None,
    delimiter: str = ",",
    progress=None,
    thresholds: Sequence[float] = THRESHOLDS,
    **fit_options: Any,
) -> Comparison:
    """Exact fit, then each solver in ``solvers`` with its options from ``solver_options[name]``;
    ``fit_options`` are :func:`tallfit.fit`'s model options (categorical, where, weights, ...)."""
    from tallfit.api import fit

    solver_options = dict(solver_options or {})
    names = list(dict.fromkeys(solvers))
    if not names:
        raise DesignError(f"no solver to compare; choose among {', '.join(SOLVERS)}")
    for name in names:
        check_solver(name, solver_options.get(name, {}))
    for name in solver_options:
        if name not in names:
            raise DesignError(f"options given for solver {name!r}, which is not among the solvers compared "
                              f"({', '.join(names)})")
    source = as_source(data, format=format, delimiter=delimiter)
    t0 = time.perf_counter()
    exact = fit(source, target, features, batch_rows=batch_rows, progress=progress, **fit_options)
    exact_seconds = time.perf_counter() - t0
    check_spec(exact.spec)
    hacc, hdesc = (None, None)
    if holdout is not None:
        hacc, hdesc = _holdout_factor(holdout, exact, batch_rows, format, delimiter)
    rank_tol = float(exact.options["rank_tol"])
    runs = []
    with DesignPasses(source, exact.spec, batch_rows, progress, coding=exact.coding, cache=cache,
                      spill_dir=spill_dir) as passes:
        for name in names:
            std = bool(solver_options.get(name, {}).get("standardize", standardize))
            problem, monitor, _ = prepare(exact.accumulator, exact.spec, rank_tol, std, hacc)
            start = time.perf_counter() - exact_seconds
            try:
                runs.append(SolverRun(name, run_solver(name, problem, passes, monitor,
                                                       solver_options.get(name, {}), start)))
            except NumericalError as exc:
                runs.append(SolverRun(name, error=str(exc)))
    cache_info = passes.cache_info  # after close: where it was, how big, and "removed"
    result = Comparison(exact, exact_seconds, runs, tuple(sorted(thresholds, reverse=True)), cache_info)
    if hacc is not None:
        result.holdout = {"description": hdesc, "n_used": int(hacc.n_used)}
        result.exact_holdout_mse = monitor.holdout_mse(monitor.beta)
    return result


__all__ = ["Comparison", "SolverRun", "compare", "SOLVERS", "DEFAULT_SOLVERS"]
