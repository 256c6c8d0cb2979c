"""Full-batch gradient descent on f(b) = ‖Xb − y‖²/(2n), one pass per iteration.

Step 1/L with L = λ_max(ZᵀZ/n), the largest eigenvalue of the Gram matrix of the (standardised)
design, known exactly from the factor the first pass gathers. With a step η ≤ 1/L every step
decreases f, and the error contracts in every eigendirection by |1 − ηλ_i| ≤ 1 − ημ, μ the
smallest eigenvalue (Nocedal & Wright, Numerical Optimization, 2nd ed., §3.3, steepest descent
on a quadratic);
``step_scale`` multiplies 1/L (above 2 the iteration diverges, which is detected).
"""

from __future__ import annotations

import numpy as np

from tallfit.solve.iterative.problem import BlockPass, Problem
from tallfit.solve.iterative.stopping import GrowthGuard, History, RunResult, check_finite, tolerance_reached

NAME = "gd"
DEFAULTS = {"max_passes": 200, "tol": 1e-8, "step_scale": 1.0}


def run(problem: Problem, blocks: BlockPass, history: History, *, max_passes: int = 200, tol: float = 1e-8,
        step_scale: float = 1.0) -> RunResult:
    eta = step_scale / problem.lipschitz
    advice = (f"the step was {step_scale:g} × 1/L; use step_scale ≤ 1 (safe by construction), and "
              "standardise the features (standardize=True)")
    guard = GrowthGuard("gradient descent", advice)
    c = np.zeros(problem.p)
    used = history.setup_passes
    history.record(problem.to_b(c), used, "start")
    g0 = None
    reason = f"pass budget of {max_passes} iterations used"
    for it in range(1, max_passes + 1):
        pp = problem.products(blocks(), problem.to_b(c))
        used += 1
        guard.update(pp.sse, f"pass {used}")
        g = problem.T.T @ pp.grad / problem.n
        gnorm = float(np.linalg.norm(g))
        g0 = gnorm if g0 is None else g0
        if it > 1 and tolerance_reached(gnorm, g0, tol):
            history.record(problem.to_b(c), used, f"iteration {it - 1}, converged")
            reason = f"gradient norm fell below {tol:g} of its start"
            break
        c = c - eta * g
        check_finite(c, "gradient descent", f"pass {used}", advice)
        history.record(problem.to_b(c), used, f"iteration {it}")
    settings = {"step": eta, "step_scale": step_scale, "lipschitz": problem.lipschitz,
                "max_passes": max_passes, "tol": tol, "standardize": problem.standardize}
    return RunResult(NAME, problem.to_b(c), reason, history, settings)
