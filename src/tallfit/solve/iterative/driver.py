"""From a factor and a pass provider to an iterative run, and from a run to a FitResult.

Every iterative run starts with the pass that gathers the exact factor R of [X | y] (the same
pass the exact fit makes). It gives the standardisation, the step-size bound, the exact loss of
any iterate (so every recorded gap is exact and costs no pass), and the inference of the result.

Inference of an iterative result: estimates are the solver's; standard errors, intervals, tests
and R² are least-squares formulas evaluated at those estimates, with (XᵀX)⁻¹ from the factor and
the residual sum of squares of the solver's own coefficients (exact, from the factor). They are
labelled as such in the result's notes, with the exact-loss gap, so they are never mistaken for
the exact solver's. Digits per coefficient are measured against the exact solution (and never
exceed what the exact solution itself can claim).
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.spec import ModelSpec
from tallfit.errors import DesignError
from tallfit.results import FitResult
from tallfit.solve.exact import DEFAULT_RANK_TOL, ExactSolution, solve_exact
from tallfit.solve.iterative import cg, gd, lbfgs, sgd
from tallfit.solve.iterative.problem import Monitor, Problem
from tallfit.solve.iterative.stopping import History, RunResult
from tallfit.solve.model import fit_from_accumulator

SOLVERS = {m.NAME: m for m in (gd, cg, lbfgs, sgd)}
LABELS = {"gd": "gradient descent", "cg": "conjugate gradients (CGLS)", "lbfgs": "L-BFGS", "sgd": "mini-batch SGD"}


def check_solver(name: str, options: dict[str, Any]) -> dict[str, Any]:
    """The solver's options with defaults filled in; unknown names give a DesignError."""
    if name not in SOLVERS:
        raise DesignError(f"unknown solver {name!r}; choose exact, {', '.join(SOLVERS)}")
    known = SOLVERS[name].DEFAULTS
    unknown = sorted(set(options) - set(known) - {"standardize"})
    if unknown:
        raise DesignError(f"unknown option(s) {', '.join(unknown)} for solver {name}; "
                          f"its options are standardize, {', '.join(known)}")
    return {**known, **{k: v for k, v in options.items() if k != "standardize"}}


def prepare(acc: FactorAccumulator, spec: ModelSpec, rank_tol: float = DEFAULT_RANK_TOL,
            standardize: bool = True, holdout: FactorAccumulator | None = None) -> tuple[Problem, Monitor, ExactSolution]:
    """The problem in the solvers' variables, the exact-loss monitor and the exact solution."""
    sol = solve_exact(acc.R, acc.names, rank_tol)
    problem = Problem(acc.R, sol.keep, acc.n_used, spec.has_intercept_column, standardize)
    monitor = Monitor(sol.R11, sol.r12, sol.rho, sol.beta, sol.keep, acc.k,
                      holdout_R=None if holdout is None else holdout.R,
                      holdout_n=0 if holdout is None else holdout.n_used)
    return problem, monitor, sol


def run_solver(name: str, problem: Problem, passes, monitor: Monitor, options: dict[str, Any],
               start: float, setup_passes: int = 1) -> RunResult:
    """Run one solver; ``passes.blocks(rng=None)`` yields the blocks of one more pass."""
    opts = check_solver(name, options)
    history = History(monitor, start, setup_passes)
    if name == "sgd":
        return sgd.run(problem, passes.blocks, history, **opts)
    return SOLVERS[name].run(problem, lambda: passes.blocks(), history, **opts)


def _digits(beta: np.ndarray, exact: ExactSolution) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.abs(beta - exact.beta) / np.where(exact.beta != 0, np.abs(exact.beta), 1.0)
        d = np.where(rel > 0, -np.log10(rel), np.inf)
    return np.clip(np.minimum(d, exact.digits), 0.0, 15.9)


def notes(run: RunResult, monitor: Monitor) -> list[str]:
    """Notes that say how an iterative result was obtained and how far it is from exact."""
    b = run.beta
    label = LABELS[run.solver]
    out = [
        f"coefficients from {label} ({run.stop_reason}; {run.passes} passes over the data, the first "
        f"gathering the exact factor); their training loss exceeds the least-squares optimum by "
        f"{monitor.relative_gap(b):.2e} of the residual sum of squares, and they differ from the exact "
        f"solution by {monitor.coef_error(b):.1e} (relative 2-norm)",
        "standard errors, intervals, tests and R² are least-squares formulas evaluated at these "
        "coefficients ((XᵀX)⁻¹ from the factor, residual sum of squares of these coefficients); trust "
        "them only as far as the gap above is negligible",
    ]
    if run.solver == "sgd" and run.settings.get("l2"):
        out.append(f"an L2 penalty ({run.settings['l2']:g} on the standardised coefficients) shrank the "
                   "coefficients: they are not least squares, and the inference shown does not apply to them")
    return out


def result_from_run(spec: ModelSpec, acc: FactorAccumulator, run: RunResult, monitor: Monitor,
                    exact: ExactSolution, cache_info: dict | None = None, **common: Any) -> FitResult:
    """A FitResult whose estimates are the run's, with inference and notes as described above."""
    iterations = run.to_dict()
    if cache_info is not None:
        iterations["cache"] = cache_info
    options = dict(common.pop("options", {}))
    options.update(solver=run.solver, solver_options=dict(run.settings))
    result = fit_from_accumulator(spec, acc, beta=run.beta, rss=monitor.sse(run.beta),
                                  solver=f"iterative-{run.solver}", iterations=iterations, options=options,
                                  **common)
    result.digits = _digits(run.beta, exact)
    result.warnings[:0] = notes(run, monitor)
    return result


def check_spec(spec: ModelSpec) -> None:
    """Iterative solvers need plain rows: no absorbed key, no per-group fits."""
    for name in ("absorb", "by"):
        if getattr(spec, name, None):
            raise DesignError(f"the iterative solvers do not support {name!r} (their passes see plain rows); "
                              "use the exact solver for this model")


def fit_iterative(spec: ModelSpec, acc: FactorAccumulator, passes, solver: str,
                  solver_options: dict[str, Any] | None = None, start: float | None = None,
                  **common: Any) -> FitResult:
    """Run ``solver`` over ``passes`` after the factor pass that gave ``acc``; the result as a FitResult.

    ``start`` is when the factor pass began (seconds then include it); without it the clock starts
    now. ``common`` are the keywords of :func:`~tallfit.solve.model.fit_from_accumulator`.
    """
    check_spec(spec)
    options = dict(solver_options or {})
    check_solver(solver, options)
    start = time.perf_counter() if start is None else start
    fit_from_accumulator(spec, acc, **{k: v for k, v in common.items() if k in ("on_aliased", "rank_tol", "conf_level")})
    problem, monitor, exact = prepare(acc, spec, common.get("rank_tol", DEFAULT_RANK_TOL),
                                      bool(options.get("standardize", True)))
    run = run_solver(solver, problem, passes, monitor, options, start)
    return result_from_run(spec, acc, run, monitor, exact, cache_info=passes.cache_info, **common)
