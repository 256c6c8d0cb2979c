"""The residual distribution, streamed: exact moments and MAE, a fine histogram, the largest rows.

The histogram is a sketch with a stated error: ``CELLS`` cells of width 24·s/CELLS (s the model's
residual standard deviation) over ±12·s, plus a cell on each side, so any quantile inside ±12·s
is known to within one cell (0.005·s); beyond that it is placed between the grid's end and the
exact extreme. Quantiles are interpolated within cells (Hyndman & Fan 1996, definition 4 on a
histogram).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tallfit.diagnostics.kernels import grid_index, residual_moments
from tallfit.solve.distributions import norm_ppf

CELLS = 4800
SPAN = 12.0  # in residual standard deviations
QUANTILES = (0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99, 0.999)


@dataclass
class ResidualSketch:
    """Σ|e|, Σe², Σe³, Σe⁴, min, max, and a histogram of e on a fixed grid around 0."""

    scale_sd: float
    hist: np.ndarray = field(default=None)  # type: ignore[assignment]
    sums: np.ndarray = field(default=None)  # type: ignore[assignment]
    n: float = 0  # residuals folded (with frequency weights, their weight sum)

    def __post_init__(self) -> None:
        sd = self.scale_sd if self.scale_sd > 0 and np.isfinite(self.scale_sd) else 1.0
        self.scale_sd = float(sd)
        if self.hist is None:
            self.hist = np.zeros(CELLS + 2, dtype=np.int64)
        if self.sums is None:
            self.sums = np.array([0.0, 0.0, 0.0, 0.0, np.inf, -np.inf])

    @property
    def lo(self) -> float:
        return -SPAN * self.scale_sd

    @property
    def width(self) -> float:
        return 2.0 * SPAN * self.scale_sd / CELLS

    def update(self, e: np.ndarray, w: np.ndarray | None = None) -> None:
        """Fold residuals e; with frequency weights ``w`` each stands for wᵢ residuals (the
        histogram then holds weight sums)."""
        if w is None:
            residual_moments(e, self.lo, 1.0 / self.width, CELLS, self.hist, self.sums)
            self.n += len(e)
            return
        cells = np.empty(len(e), dtype=np.int32)
        grid_index(e, self.lo, 1.0 / self.width, CELLS, cells)
        self.hist = self.hist + np.bincount(cells, weights=w, minlength=CELLS + 2)
        e2 = e * e
        self.sums[:4] += [w @ np.abs(e), w @ e2, w @ (e2 * e), w @ (e2 * e2)]
        counted = e[w > 0]
        if counted.size:
            self.sums[4] = min(self.sums[4], counted.min())
            self.sums[5] = max(self.sums[5], counted.max())
        self.n += float(w.sum())

    def merge(self, other: "ResidualSketch") -> "ResidualSketch":
        s = self.sums + other.sums
        s[4], s[5] = min(self.sums[4], other.sums[4]), max(self.sums[5], other.sums[5])
        return ResidualSketch(self.scale_sd, self.hist + other.hist, s, self.n + other.n)

    def quantile(self, q: float) -> float:
        """The q-quantile of the residuals, to within one cell (see the module note)."""
        if self.n == 0:
            return float("nan")
        target = q * self.n
        cum = np.cumsum(self.hist)
        k = int(np.searchsorted(cum, target, side="left"))
        k = min(k, len(cum) - 1)
        before = cum[k - 1] if k > 0 else 0
        inside = self.hist[k]
        frac = (target - before) / inside if inside else 0.0
        if k == 0:
            a, b = self.sums[4], self.lo
        elif k == CELLS + 1:
            a, b = self.lo + CELLS * self.width, self.sums[5]
        else:
            a = self.lo + (k - 1) * self.width
            b = a + self.width
        return float(np.clip(a + frac * (b - a), self.sums[4], self.sums[5]))

    def summary(self) -> dict[str, Any]:
        n = self.n
        a1, a2, a3, a4, mn, mx = self.sums
        sd = np.sqrt(a2 / n) if n else float("nan")
        return {
            "n": int(round(n)),
            "mae": float(a1 / n) if n else float("nan"),
            "rmse": float(sd),
            "skewness": float(a3 / n / sd**3) if n and sd > 0 else float("nan"),
            "excess_kurtosis": float(a4 / n / sd**4 - 3.0) if n and sd > 0 else float("nan"),
            "min": float(mn),
            "max": float(mx),
            "quantiles": {str(q): self.quantile(q) for q in QUANTILES},
            "quantile_error_bound": float(self.width),
        }

    def normal_comparison(self, points: int = 99) -> dict[str, list[float]]:
        """Residual quantiles against a normal with the residuals' RMS (a Q-Q comparison)."""
        probs = (np.arange(1, points + 1) - 0.5) / points
        sd = np.sqrt(self.sums[1] / self.n) if self.n else 1.0
        return {
            "prob": probs.tolist(),
            "normal": (norm_ppf(probs) * sd).tolist(),
            "residual": [self.quantile(p) for p in probs],
        }

    def histogram(self, bins: int = 60) -> dict[str, list[float]]:
        """A coarser histogram for display over the central ±4 s (counts outside are given apart)."""
        per = CELLS // (2 * int(SPAN))  # cells per s
        start = 1 + int(SPAN - 4) * per
        stop = 1 + int(SPAN + 4) * per
        inner = self.hist[start:stop]
        group = max(1, len(inner) // bins)
        usable = (len(inner) // group) * group
        counts = inner[:usable].reshape(-1, group).sum(axis=1)
        edges = self.lo + (start - 1 + np.arange(len(counts) + 1) * group) * self.width
        return {
            "edges": edges.tolist(),
            "counts": counts.tolist(),
            "below": int(self.hist[:start].sum()),
            "above": int(self.hist[stop:].sum()),
        }


@dataclass
class TopRows:
    """The k rows with the largest values of a score, with their place and pass-through ids."""

    k: int
    label: str
    values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    rows: list[dict[str, Any]] = field(default_factory=list)

    def update(self, score: np.ndarray, detail) -> None:
        """``detail(idx)`` returns one dict per selected row index of this block."""
        if self.k <= 0 or score.size == 0:
            return
        floor = self.values.min() if len(self.values) >= self.k else -np.inf
        if score.max() <= floor:  # the common case once k rows are in: one reduction, no mask
            return
        candidates = np.flatnonzero(score > floor)
        if candidates.size == 0:
            return
        if candidates.size > self.k:
            # the k-th largest value t by partition; among rows tied at t the earliest win, as
            # in one pass (argpartition's choice among ties depends on the numpy build)
            s = score[candidates]
            t = s[np.argpartition(s, -self.k)[-self.k]]
            above = candidates[s > t]
            ties = candidates[s == t][: self.k - above.size]
            candidates = np.concatenate([above, ties])
        new_rows = detail(candidates)
        values = np.concatenate([self.values, score[candidates]])
        rows = self.rows + new_rows
        order = np.argsort(-values, kind="stable")[: self.k]
        self.values = values[order]
        self.rows = [rows[i] for i in order]

    def merge(self, other: "TopRows") -> "TopRows":
        """The k largest of both (ties keep this one's rows first, as one pass over both would)."""
        values = np.concatenate([self.values, other.values])
        rows = self.rows + other.rows
        order = np.argsort(-values, kind="stable")[: self.k]
        return TopRows(self.k, self.label, values[order], [rows[i] for i in order])

    def to_list(self) -> list[dict[str, Any]]:
        return [dict(r) for r in self.rows]
