"""Shared by every iterative solver: the record of each pass, stopping rules, divergence checks.

A solver stops on its own tolerance, on its pass budget, or because the loss no longer moves
(floating-point floor), and says which. It never returns garbage: non-finite values, or a loss
that grows for several consecutive steps by more than rounding, raise
:class:`~tallfit.errors.NumericalError` with a concrete suggestion.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from tallfit.errors import NumericalError
from tallfit.solve.iterative.problem import Monitor

GROWTH_PATIENCE = 3  # common practice: a few consecutive increases, not one, signal divergence
ROUNDING_GROWTH = 1e-10  # relative increase below this is rounding noise, not divergence


class DivergenceError(NumericalError):
    """An iterative solver diverged (non-finite values or a loss that keeps growing)."""


@dataclass
class Step:
    """What is known after one pass: exact figures of the iterate available at that point."""

    passes: int  # passes over the data so far, the first (factor) pass included
    seconds: float  # wall time since the start, the first pass included
    loss_gap: float  # ‖Xb − y‖² − min ‖Xβ − y‖² (exact, from the factor)
    relative_gap: float
    coef_error: float
    holdout_mse: float | None = None
    label: str = ""  # "epoch 3", "iteration 7"
    coef: list[float] | None = None  # the iterate, in the original units


@dataclass
class History:
    """The per-pass record of one run, with the clock started by the caller."""

    monitor: Monitor
    start: float
    setup_passes: int = 1
    steps: list[Step] = field(default_factory=list)

    def record(self, b: np.ndarray, passes: int, label: str = "") -> Step:
        step = Step(
            passes=int(passes),
            seconds=time.perf_counter() - self.start,
            loss_gap=self.monitor.gap(b),
            relative_gap=self.monitor.relative_gap(b),
            coef_error=self.monitor.coef_error(b),
            holdout_mse=self.monitor.holdout_mse(b),
            label=label,
            coef=[float(v) for v in b],
        )
        self.steps.append(step)
        return step

    def as_dicts(self) -> list[dict]:
        return [vars(s).copy() for s in self.steps]


def check_finite(values: np.ndarray | float, solver: str, where: str, advice: str) -> None:
    if not np.all(np.isfinite(values)):
        raise DivergenceError(f"{solver} diverged at {where}: the coefficients or the loss became "
                              f"non-finite; {advice}")


class GrowthGuard:
    """Raises when a loss grows for ``patience`` consecutive steps by more than ``growth`` (relative;
    rounding for exact losses, a noise margin for the sampled losses of SGD)."""

    def __init__(self, solver: str, advice: str, patience: int = GROWTH_PATIENCE,
                 growth: float = ROUNDING_GROWTH) -> None:
        self.solver, self.advice, self.patience, self.growth = solver, advice, patience, growth
        self.previous = math.inf
        self.first: float | None = None
        self.run = 0

    def update(self, loss: float, where: str) -> None:
        check_finite(loss, self.solver, where, self.advice)
        if self.first is None:
            self.first = loss
        if loss > self.previous * (1.0 + self.growth):
            self.run += 1
        else:
            self.run = 0
        if self.run >= self.patience:
            raise DivergenceError(
                f"{self.solver} diverged: the training loss grew in {self.run} consecutive steps "
                f"(to {loss:.6g} at {where}, from {self.first:.6g} at the first); {self.advice}"
            )
        self.previous = loss


@dataclass
class RunResult:
    """The outcome of one solver run, in the original units of the coefficients."""

    solver: str
    beta: np.ndarray
    stop_reason: str
    history: History
    settings: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)

    @property
    def passes(self) -> int:
        return self.history.steps[-1].passes if self.history.steps else self.history.setup_passes

    def to_dict(self) -> dict:
        last = self.history.steps[-1] if self.history.steps else None
        return {
            "solver": self.solver,
            "stop_reason": self.stop_reason,
            "passes": self.passes,
            "setup_passes": self.history.setup_passes,
            "final_relative_gap": None if last is None else last.relative_gap,
            "settings": dict(self.settings),
            **self.extra,
            "history": self.history.as_dicts(),
        }


def tolerance_reached(norm: float, first: float, tol: float) -> bool:
    """Relative gradient-norm test ‖g_k‖ ≤ tol·‖g_0‖ (scale free)."""
    return first == 0.0 or norm <= tol * first
