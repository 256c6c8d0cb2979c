"""Conjugate gradients on the least-squares problem (CGLS), one pass per iteration.

CGLS (Hestenes & Stiefel 1952; Paige & Saunders, ACM TOMS 8, 1982, §7; Björck 1996, §7.4)
applies CG to ZᵀZ c = Zᵀy without forming ZᵀZ. Out of core the n-vectors r and Zd cannot be
kept, so each pass recomputes them: at the iterate c_k and direction d_k it streams the true
gradient s_k = Zᵀ(y − Zc_k) and the product ZᵀZ d_k together, then

    α = s_k·d_k / ‖Z d_k‖²,  c ← c + α d,  s ← s_k − α ZᵀZ d_k,  d ← s + (‖s‖²/‖s_k‖²) d

i.e. CGLS with the residual replaced by the true one every step (it cannot drift). The first pass
only gives s_0 (d_0 = s_0). Z is the standardised design when ``standardize`` (a diagonal-plus-
shift preconditioner).
"""

from __future__ import annotations

import numpy as np

from tallfit.solve.iterative.problem import BlockPass, Problem
from tallfit.solve.iterative.stopping import GrowthGuard, History, RunResult, check_finite, tolerance_reached

NAME = "cg"
DEFAULTS = {"max_passes": 100, "tol": 1e-10}
ADVICE = "standardise the features (standardize=True) or use the exact solver"


def run(problem: Problem, blocks: BlockPass, history: History, *, max_passes: int = 100, tol: float = 1e-10) -> RunResult:
    T = problem.T
    c = np.zeros(problem.p)
    used = history.setup_passes
    history.record(problem.to_b(c), used, "start")
    guard = GrowthGuard("conjugate gradients", ADVICE)
    d = None
    s0 = None
    reason = f"pass budget of {max_passes} iterations used"
    for it in range(1, max_passes + 1):
        V = None if d is None else (T @ d)[:, None]
        pp = problem.products(blocks(), T @ c, V)
        used += 1
        guard.update(pp.sse, f"pass {used}")
        s = -(T.T @ pp.grad)  # Zᵀ(y − Zc)
        snorm = float(np.linalg.norm(s))
        s0 = snorm if s0 is None else s0
        if d is None:
            d = s.copy()
            continue
        if tolerance_reached(snorm, s0, tol):
            history.record(problem.to_b(c), used, f"iteration {it - 1}, converged")
            reason = f"gradient norm fell below {tol:g} of its start"
            break
        zd2 = float(pp.v_norms[0])
        if zd2 <= 0.0:
            reason = "search direction vanished (the gradient is zero to rounding)"
            break
        alpha = float(s @ d) / zd2
        c = c + alpha * d
        s_next = s - alpha * (T.T @ pp.hv[:, 0])
        d = s_next + (float(s_next @ s_next) / float(s @ s)) * d
        check_finite(c, "conjugate gradients", f"pass {used}", ADVICE)
        history.record(problem.to_b(c), used, f"iteration {it - 1}")
    settings = {"max_passes": max_passes, "tol": tol, "standardize": problem.standardize}
    return RunResult(NAME, problem.to_b(c), reason, history, settings)
