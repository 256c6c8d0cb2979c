"""Term selection from the factor: forward, backward and exhaustive best subset, no data pass.

The residual sum of squares of any subset S of the columns is the last diagonal entry, squared,
of the factor of [X_S | y], which is triu(qr(R[:, S ∪ y])) (NUMERICS.md: recoding columns after
the pass). Criteria (the conventions of tallfit's inference, hence of statsmodels' OLS): with
p_S coefficients, AIC = n log(2π RSS/n) + n + 2 p_S, BIC = … + p_S log n, adjusted R² =
1 − (RSS/(n − p_S)) / (TSS/(n − 1)); "cv" is the k-fold cross-validated mean squared error.

Best subset uses the bound behind Furnival & Wilson's "leaps and bounds" (Technometrics 16,
1974): removing columns never lowers the RSS, so a branch whose largest model already has an
RSS at least the best found for every size it can reach is skipped. Branches drop one column at
a time; all children's RSS come at once from RSS(T \\ j) = RSS(T) + β_j² / [(X_TᵀX_T)⁻¹]_jj.
For AIC, BIC and adjusted R² the best model of each size is the one with the least RSS, so the
search is exact; for "cv" the per-size winners are compared by their CV error.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import qr, solve_triangular

from tallfit.accumulate.folds import heldout_sse
from tallfit.errors import DesignError
from tallfit.solve.exact import find_aliases

CRITERIA = ("aic", "bic", "adj_r2", "cv")
MAX_GROUPED_BEST = 12  # 4,096 subsets of terms, each one small QR
MAX_BEST_SUBSET = 20


def subset_factor(R: np.ndarray, cols: list[int]) -> np.ndarray:
    """Triangular factor of [X_cols | y] from the full factor (reorder, re-triangularise)."""
    return np.triu(qr(R[:, list(cols) + [R.shape[0] - 1]], mode="r")[0])[: len(cols) + 1]


def subset_rss(R: np.ndarray, cols: list[int]) -> float:
    if not cols:
        return float(np.sum(R[:, -1] ** 2))
    Rs = subset_factor(R, cols)
    return float(Rs[-1, -1] ** 2)


def subset_coef(R: np.ndarray, cols: list[int]) -> np.ndarray:
    Rs = subset_factor(R, cols)
    p = len(cols)
    return solve_triangular(Rs[:p, :p], Rs[:p, p])


def score(rss: float, n: int, p: int, tss: float) -> dict[str, float]:
    """AIC, BIC and adjusted R² of a model with p coefficients (statsmodels' OLS conventions)."""
    llf = -0.5 * n * (np.log(2.0 * np.pi * rss / n) + 1.0)
    return {
        "aic": float(-2.0 * llf + 2.0 * p),
        "bic": float(-2.0 * llf + p * np.log(n)),
        "adj_r2": float(1.0 - (rss / (n - p)) / (tss / (n - 1))) if n > p else float("nan"),
    }


def subset_cv(train_factors, heldout_factors, cols: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Per-fold held-out MSE and row counts of the OLS fit on columns ``cols`` (exact, from factors)."""
    mse = np.empty(len(heldout_factors))
    n = np.empty(len(heldout_factors), dtype=np.int64)
    for j, (train, held) in enumerate(zip(train_factors, heldout_factors)):
        keep, _ = find_aliases(subset_factor(train.R, cols), [str(c) for c in cols])
        used = [cols[i] for i in keep]
        b = subset_coef(train.R, used) if used else np.zeros(0)
        n[j] = held.n_used
        if held.n_used == 0:
            raise DesignError(f"fold {j + 1} of {len(heldout_factors)} has no rows; use fewer folds")
        mse[j] = heldout_sse(held.R, used, b) / held.n_used if used else np.sum(held.R[:, -1] ** 2) / held.n_used
    return mse, n


@dataclass
class Candidate:
    """One model met during the search: its columns and scores."""

    cols: list[int]
    rss: float
    scores: dict[str, float] = field(default_factory=dict)


class _Scorer:
    """Scores subsets (forced columns always included) under one criterion; lower is better."""

    def __init__(self, R, n, forced, criterion, tss, folds=None):
        if criterion not in CRITERIA:
            raise DesignError(f"unknown selection criterion {criterion!r}; choose one of {', '.join(CRITERIA)}")
        if criterion == "cv" and folds is None:
            raise DesignError("selection by CV error needs folds: give --folds 5 (or more)")
        self.R, self.n, self.forced, self.criterion, self.tss, self.folds = R, n, list(forced), criterion, tss, folds

    def candidate(self, extra: list[int]) -> Candidate:
        cols = self.forced + sorted(extra)
        rss = subset_rss(self.R, cols)
        sc = score(rss, self.n, len(cols), self.tss)
        if self.folds is not None:
            sc["cv"] = float(subset_cv(self.folds[0], self.folds[1], cols)[0].mean())
        return Candidate(cols, rss, sc)

    def key(self, c: Candidate) -> float:
        v = c.scores[self.criterion]
        return -v if self.criterion == "adj_r2" else v


def _flat(groups: list[list[int]]) -> list[int]:
    return [j for g in groups for j in g]


def forward(scorer: _Scorer, pool: list[list[int]]) -> tuple[list[Candidate], Candidate]:
    """Add the term (a group of columns: a categorical's indicators go together) that improves the
    criterion most, until none does; the path and the winner."""
    current = scorer.candidate([])
    path = [current]
    chosen: list[list[int]] = []
    left = [list(g) for g in pool]
    while left:
        trials = [scorer.candidate(_flat(chosen + [g])) for g in left]
        i = min(range(len(trials)), key=lambda t: scorer.key(trials[t]))
        if scorer.key(trials[i]) >= scorer.key(current):
            break
        chosen.append(left.pop(i))
        current = trials[i]
        path.append(current)
    return path, current


def backward(scorer: _Scorer, pool: list[list[int]]) -> tuple[list[Candidate], Candidate]:
    """Remove the term whose removal improves the criterion most until none does."""
    chosen = [list(g) for g in pool]
    current = scorer.candidate(_flat(chosen))
    path = [current]
    while chosen:
        trials = [scorer.candidate(_flat(chosen[:i] + chosen[i + 1:])) for i in range(len(chosen))]
        i = min(range(len(trials)), key=lambda t: scorer.key(trials[t]))
        if scorer.key(trials[i]) >= scorer.key(current):
            break
        chosen.pop(i)
        current = trials[i]
        path.append(current)
    return path, current


def best_grouped_subsets(R: np.ndarray, forced: list[int], pool: list[list[int]]) -> dict[int, tuple[float, list[int]]]:
    """The least-RSS subset of every size (number of terms) when some terms span several columns,
    by enumerating every subset of terms (up to MAX_GROUPED_BEST terms)."""
    from itertools import combinations

    if len(pool) > MAX_GROUPED_BEST:
        raise DesignError(
            f"best-subset search over terms of several columns (categorical) is limited to {MAX_GROUPED_BEST} "
            f"terms ({len(pool)} given); use forward or backward selection, or fewer candidates")
    best: dict[int, tuple[float, list[int]]] = {}
    for size in range(len(pool) + 1):
        for combo in combinations(range(len(pool)), size):
            cols = sorted(_flat([pool[i] for i in combo]))
            rss = subset_rss(R, forced + cols)
            if rss < best.get(size, (np.inf, []))[0]:
                best[size] = (rss, cols)
    return best


def _child_rss(Rt: np.ndarray) -> tuple[float, np.ndarray]:
    """RSS of the model of factor Rt and the RSS after dropping each of its columns."""
    m = Rt.shape[0] - 1
    rho2 = float(Rt[m, m] ** 2)
    inv = solve_triangular(Rt[:m, :m], np.eye(m))
    beta = inv @ Rt[:m, m]
    v = np.einsum("ij,ij->i", inv, inv)  # diag of (X'X)⁻¹
    return rho2, rho2 + beta**2 / v


def best_subsets(R: np.ndarray, forced: list[int], pool: list[int],
                 seeds: list[tuple[float, list[int]]] = ()) -> tuple[dict[int, tuple[float, list[int]]], int]:
    """The least-RSS subset of every size (number of pool columns) by branch and bound.

    ``seeds`` are (RSS, pool columns) of models already known (e.g. a forward path): they start
    the bounds. Returns ({size: (rss, pool columns)}, nodes examined). The pool must be free of
    aliased columns (every subset then has full rank).
    """
    if len(pool) > MAX_BEST_SUBSET:
        raise DesignError(
            f"best-subset search is limited to {MAX_BEST_SUBSET} candidate terms ({len(pool)} given); "
            "use forward or backward selection, or fewer candidates"
        )
    f = len(forced)
    root = subset_factor(R, forced + pool)
    rss0, drops = _child_rss(root)
    # The most important columns first, so that the large branches which drop them are cut early.
    order = [pool[i] for i in np.argsort(-drops[f:], kind="stable")]
    best: dict[int, tuple[float, list[int]]] = {len(pool): (rss0, list(order))}
    for rss, cols in seeds:
        if rss < best.get(len(cols), (np.inf, []))[0]:
            best[len(cols)] = (rss, list(cols))
    nodes = 1
    # depth first; an entry is (columns of T in search order, factor of [forced, T, y], first droppable)
    stack = [(list(order), subset_factor(R, forced + order), 0)]
    while stack:
        cols, Rt, start = stack.pop()
        _, child = _child_rss(Rt)
        size = len(cols) - 1
        for pos in range(len(cols) - 1, start - 1, -1):
            rss = float(child[f + pos])
            kept = cols[:pos] + cols[pos + 1 :]
            nodes += 1
            if rss < best.get(size, (np.inf, []))[0]:
                best[size] = (rss, kept)
            below = range(size - (len(cols) - 1 - pos), size)  # sizes of this child's descendants
            if not below or all(rss >= best.get(s, (np.inf, []))[0] for s in below):
                continue
            Rc = np.delete(Rt, f + pos, axis=1)
            stack.append((kept, np.triu(qr(Rc, mode="r")[0])[: Rc.shape[1]], pos))
    if 0 not in best:
        best[0] = (subset_rss(R, forced), [])
    return best, nodes


@dataclass
class Selection:
    """What a search found: the models it passed through and the chosen one (column indices)."""

    method: str
    criterion: str
    path: list[Candidate]
    chosen: Candidate
    excluded: list[int]  # pool columns left out because they are combinations of others
    nodes: int = 0


def term_groups(pool: list[int], names: list[str], categorical=()) -> list[list[int]]:
    """Candidate terms: each column alone, except a categorical column's indicators, which enter
    and leave together (they are one factor of the model, coded against one reference level)."""
    groups: dict[str, list[int]] = {}
    for j in pool:
        key = next((c for c in categorical if names[j].startswith(f"{c}[")), names[j])
        groups.setdefault(key, []).append(j)
    return list(groups.values())


def select(R: np.ndarray, n: int, names: list[str], intercept: bool, method: str, criterion: str,
           folds=None, categorical=()) -> Selection:
    """Run one search over the design's terms (the intercept is always kept)."""
    p = R.shape[0] - 1
    forced = [0] if intercept else []
    keep, _ = find_aliases(R, names[:-1])
    pool = [j for j in keep if j not in forced]
    excluded = [j for j in range(len(forced), p) if j not in keep]
    terms = term_groups(pool, names, categorical)
    tss = float(np.sum(R[1:, -1] ** 2)) if intercept else float(np.sum(R[:, -1] ** 2))
    scorer = _Scorer(R, n, forced, criterion, tss, folds)
    if method == "forward":
        path, chosen = forward(scorer, terms)
        return Selection(method, criterion, path, chosen, excluded)
    if method == "backward":
        path, chosen = backward(scorer, terms)
        return Selection(method, criterion, path, chosen, excluded)
    if method != "best":
        raise DesignError(f"unknown selection method {method!r}; choose forward, backward or best")
    if any(len(t) > 1 for t in terms):
        best = best_grouped_subsets(R, forced, terms)
        nodes = 2 ** len(terms)
    else:
        fpath, _ = forward(_Scorer(R, n, forced, "bic", tss), terms)
        seeds = [(c.rss, c.cols[len(forced):]) for c in fpath]
        best, nodes = best_subsets(R, forced, pool, seeds)
    path = [scorer.candidate(best[s][1]) for s in sorted(best)]
    chosen = min(path, key=scorer.key)
    return Selection(method, criterion, path, chosen, excluded, nodes)
