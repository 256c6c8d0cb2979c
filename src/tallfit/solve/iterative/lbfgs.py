"""L-BFGS (Nocedal & Wright, Numerical Optimization, 2nd ed., ch. 7) through scipy.optimize.

scipy's L-BFGS-B drives the iteration; each evaluation of the loss and its gradient is one
streamed pass, so the passes counted are scipy's function evaluations (line-search trials
included). The stopping rule is ours, applied in the callback after every iteration: the
gradient norm relative to its start, or the pass budget; scipy's own tests are set so tight that
they only fire at the floating-point floor, which is then reported as such.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize

from tallfit.solve.iterative.problem import BlockPass, Problem
from tallfit.solve.iterative.stopping import (
    DivergenceError,
    History,
    RunResult,
    check_finite,
    tolerance_reached,
)

NAME = "lbfgs"
DEFAULTS = {"max_passes": 100, "tol": 1e-10, "memory": 10}
ADVICE = "standardise the features (standardize=True) or use the exact solver"


class _Budget(Exception):
    pass


def run(problem: Problem, blocks: BlockPass, history: History, *, max_passes: int = 100, tol: float = 1e-10,
        memory: int = 10) -> RunResult:
    n, T = problem.n, problem.T
    state = {"passes": history.setup_passes, "last_c": None, "last_g": None, "g0": None, "reason": None, "it": 0}
    c0 = np.zeros(problem.p)
    history.record(problem.to_b(c0), state["passes"], "start")

    def fun(c: np.ndarray):
        if state["passes"] - history.setup_passes >= max_passes:
            raise _Budget
        pp = problem.products(blocks(), T @ c)
        state["passes"] += 1
        check_finite(pp.sse, "L-BFGS", f"pass {state['passes']}", ADVICE)
        g = T.T @ pp.grad / n
        state["last_c"], state["last_g"] = c.copy(), g
        if state["g0"] is None:
            state["g0"] = float(np.linalg.norm(g))
        return 0.5 * pp.sse / n, g

    def callback(intermediate_result):
        c = intermediate_result.x
        state["it"] += 1
        history.record(problem.to_b(c), state["passes"], f"iteration {state['it']}")
        state["best"] = c.copy()
        g = state["last_g"] if np.array_equal(c, state["last_c"]) else None
        if g is not None and tolerance_reached(float(np.linalg.norm(g)), state["g0"], tol):
            state["reason"] = f"gradient norm fell below {tol:g} of its start"
            raise StopIteration

    state["best"] = c0
    opts = {"maxcor": int(memory), "maxiter": 10 * max_passes + 10, "maxfun": 10 * max_passes + 10,
            "ftol": 1e-16, "gtol": 0.0}
    try:
        res = minimize(fun, c0, jac=True, method="L-BFGS-B", callback=callback, options=opts)
        c = res.x if np.all(np.isfinite(res.x)) else state["best"]
        if state["reason"] is None:
            state["reason"] = ("loss stopped decreasing (floating-point floor)" if res.success or res.status == 2
                               else f"scipy stopped: {res.message}")
    except _Budget:
        c = state["best"]
        state["reason"] = f"pass budget of {max_passes} evaluations used"
    except DivergenceError:
        raise
    check_finite(c, "L-BFGS", f"pass {state['passes']}", ADVICE)
    last = history.steps[-1]
    if last.passes != state["passes"]:
        history.record(problem.to_b(c), state["passes"], "final")
    settings = {"max_passes": max_passes, "tol": tol, "memory": memory, "standardize": problem.standardize}
    return RunResult(NAME, problem.to_b(c), state["reason"], history, settings)
