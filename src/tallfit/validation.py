"""How well a model predicts rows it was not fitted on: the value objects and their assembly.

Everything is derived from the factors of one pass (``engine.split``): the training fit is the
merge of the fold factors; cross-validation, holdout error, the ridge path, term selection and
nested tests come from the small factors alone. ``to_dict`` is the JSON form.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tallfit.accumulate.folds import FoldAccumulators, heldout_sse
from tallfit.results import FitResult

SELECTION_CAUTION = (
    "terms chosen by searching these same data look better than they are: p-values, intervals and "
    "R² of the selected model are optimistic (the search is not accounted for); judge it on new "
    "rows (holdout) or cross-validation, and do not read its p-values as tests"
)
CV_CAUTION = (
    "cross-validation assumes held-out rows are like future rows; rows of one host or one day are "
    "related, so split by a key (--fold-key) or the error will look smaller than it is"
)


def _f(values) -> list[float]:
    return [float(v) for v in np.asarray(values).ravel()]


@dataclass
class CVReport:
    """k-fold CV of one model: per-fold held-out MSE, their mean and its standard error."""

    fold_n: np.ndarray
    fold_mse: np.ndarray
    key: str | None

    @property
    def mean(self) -> float:
        return float(self.fold_mse.mean())

    @property
    def se(self) -> float:
        return float(self.fold_mse.std(ddof=1) / np.sqrt(self.fold_mse.size))

    @property
    def pooled(self) -> float:
        """Σ SSE_j / Σ n_j: every held-out row weighted equally."""
        return float(np.sum(self.fold_mse * self.fold_n) / np.sum(self.fold_n))

    def to_dict(self) -> dict:
        return {"folds": int(self.fold_mse.size), "key": self.key, "fold_rows": [int(n) for n in self.fold_n],
                "fold_mse": _f(self.fold_mse), "mean_mse": self.mean, "se_mse": self.se,
                "rmse": float(np.sqrt(self.mean)), "pooled_mse": self.pooled}


@dataclass
class HoldoutReport:
    """Error on the held-out rows of a model fitted on the rest."""

    n: int
    sse: float
    tss: float  # about the holdout mean (with an intercept), else Σy²
    key: str | None
    fraction: float
    sae: float | None = None  # Σ|e|, from a second pass when asked

    @property
    def mse(self) -> float:
        return self.sse / self.n

    def to_dict(self) -> dict:
        return {"rows": self.n, "key": self.key, "fraction": self.fraction, "mse": self.mse,
                "rmse": float(np.sqrt(self.mse)),
                "r_squared": 1.0 - self.sse / self.tss if self.tss > 0 else float("nan"),
                "mae": None if self.sae is None else self.sae / self.n}


@dataclass
class RidgeReport:
    """The ridge path: coefficients, effective df and (with folds) CV error for each penalty."""

    terms: list[str]
    penalties: np.ndarray
    coef: np.ndarray  # (L, p)
    df: np.ndarray
    scales: np.ndarray  # feature standard deviations the penalty uses
    cv_mean: np.ndarray | None = None
    cv_se: np.ndarray | None = None
    best: int | None = None
    one_se: int | None = None
    rule: str = "min"
    holdout_mse: np.ndarray | None = None
    chosen_fit: FitResult | None = None
    holdout_mae: float | None = None  # of the chosen fit, from the second pass when asked

    @property
    def chosen(self) -> int | None:
        if self.cv_mean is not None:
            return self.one_se if self.rule == "1se" else self.best
        if self.holdout_mse is not None:
            return int(np.argmin(self.holdout_mse))
        return None

    def to_dict(self) -> dict:
        c = self.chosen
        return {
            "terms": list(self.terms),
            "penalties": _f(self.penalties),
            "effective_df": _f(self.df),
            "feature_sd": {t: float(v) for t, v in zip(self.terms[1:], self.scales)},
            "coefficients": {t: _f(self.coef[:, i]) for i, t in enumerate(self.terms)},
            "cv_mse": None if self.cv_mean is None else _f(self.cv_mean),
            "cv_se": None if self.cv_se is None else _f(self.cv_se),
            "holdout_mse": None if self.holdout_mse is None else _f(self.holdout_mse),
            "penalty_min_cv": None if self.best is None else float(self.penalties[self.best]),
            "penalty_one_se": None if self.one_se is None else float(self.penalties[self.one_se]),
            "rule": self.rule,
            "chosen_penalty": None if c is None else float(self.penalties[c]),
            "chosen_effective_df": None if c is None else float(self.df[c]),
            "chosen_holdout_mae": self.holdout_mae,
        }


@dataclass
class SelectionReport:
    """A term search: the models it went through, the chosen one, and the caution."""

    method: str
    criterion: str
    steps: list[dict]
    chosen: list[str]
    excluded: list[str]
    nodes: int = 0
    caution: str = SELECTION_CAUTION

    def to_dict(self) -> dict:
        return {"method": self.method, "criterion": self.criterion, "steps": self.steps,
                "chosen_terms": list(self.chosen), "excluded_aliased": list(self.excluded),
                "subsets_examined": self.nodes or None, "caution": self.caution}


@dataclass
class ValidationReport:
    """Everything one validation run found, around the ordinary fit on the training rows."""

    fit: FitResult
    split: dict[str, Any]
    n_read: int
    cv: CVReport | None = None
    holdout: HoldoutReport | None = None
    ridge: RidgeReport | None = None
    selection: SelectionReport | None = None
    nested: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    cautions: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "target": self.fit.spec.target,
            "terms": list(self.fit.terms),
            "split": self.split,
            "n_read": self.n_read,
            "n_train": int(self.fit.inference.n_used),
            "train_r_squared": self.fit.inference.r_squared,
            "train_mse": self.fit.inference.rss / self.fit.inference.n_used,
            "cv": None if self.cv is None else self.cv.to_dict(),
            "holdout": None if self.holdout is None else self.holdout.to_dict(),
            "ridge": None if self.ridge is None else self.ridge.to_dict(),
            "selection": None if self.selection is None else self.selection.to_dict(),
            "nested_tests": list(self.nested),
            "notes": list(self.notes),
            "cautions": list(self.cautions),
        }

    def summary(self) -> str:
        from tallfit.render.validation import render_validation

        return render_validation(self)


# ------------------------------------------------------------------------------------ assembly

def full_coef(fit: FitResult) -> np.ndarray:
    """The fit's coefficients over every design column (zeros for aliased ones)."""
    names = fit.accumulator.names[:-1]
    b = np.zeros(len(names))
    for t, v in zip(fit.terms, fit.inference.estimate):
        b[names.index(t)] = v
    return b


def holdout_report(accs: FoldAccumulators, B: np.ndarray, intercept: bool) -> tuple[np.ndarray, float]:
    """Held-out SSE of each column of B (full-length coefficients) and the holdout TSS."""
    R = accs.holdout.R
    sse = heldout_sse(R, list(range(R.shape[0] - 1)), B.reshape(R.shape[0] - 1, -1))
    tss = float(np.sum(R[1:, -1] ** 2)) if intercept else float(np.sum(R[:, -1] ** 2))
    return sse, tss


def selection_report(sel, names: list[str]) -> SelectionReport:
    steps = [{"terms": [names[c] for c in cand.cols], "rss": cand.rss, **cand.scores} for cand in sel.path]
    return SelectionReport(sel.method, sel.criterion, steps, [names[c] for c in sel.chosen.cols],
                           [names[c] for c in sel.excluded], sel.nodes)


def build_validation(
    spec,
    accs: FoldAccumulators,
    *,
    fit_options: dict[str, Any],
    ridge: Any = None,
    ridge_count: int = 50,
    ridge_rule: str = "min",
    select: str | None = None,
    criterion: str = "bic",
    compare: list[list[str]] = (),
) -> ValidationReport:
    """All the factor-only results of one split pass (no data is read here)."""
    from tallfit.solve.model import fit_from_accumulator
    from tallfit.solve.ridge import cv_path, default_penalties, ridge_fit_result, ridge_path
    from tallfit.solve.selection import select as run_selection
    from tallfit.solve.selection import subset_cv

    plan = accs.plan
    train = accs.training()
    fit = fit_from_accumulator(spec, train, **fit_options)
    names = train.names
    design = names[:-1]
    report = ValidationReport(fit=fit, split=plan.to_dict(), n_read=accs.n_read, cautions=[CV_CAUTION])
    for key, count in accs.missing_keys.items():
        report.notes.append(f"{count} rows have no value in key column {key!r}; they form one group of their own")
    folds = None
    if plan.folds >= 2:
        folds = (accs.training_factors(), accs.folds)
        keep = [design.index(t) for t in fit.terms]
        mse, n = subset_cv(folds[0], folds[1], keep)
        report.cv = CVReport(n, mse, plan.fold_key)
    if accs.holdout is not None:
        if accs.n_holdout == 0:
            report.notes.append("no row fell in the holdout; raise the fraction or use a key with more values")
        else:
            sse, tss = holdout_report(accs, full_coef(fit), spec.intercept)
            report.holdout = HoldoutReport(accs.n_holdout, float(sse[0]), tss, plan.holdout_key, plan.holdout)
    if ridge is not None:
        if not spec.intercept:
            from tallfit.errors import DesignError

            raise DesignError("ridge here keeps an unpenalised intercept: drop --no-intercept to use it")
        if ridge_rule not in ("min", "1se"):
            raise ValueError(f"ridge_rule must be 'min' or '1se', not {ridge_rule!r}")
        lam = default_penalties(train.R, train.n_used, ridge_count) if isinstance(ridge, str) else \
            np.sort(np.asarray(ridge, dtype=np.float64).ravel())
        path = ridge_path(train.R, train.n_used, lam)
        rr = RidgeReport(design, lam, path.coef, path.df, path.scales, rule=ridge_rule)
        if folds is not None:
            pcv = cv_path(folds[0], folds[1], lam)
            rr.cv_mean, rr.cv_se, rr.best, rr.one_se = pcv.mean, pcv.se, pcv.best, pcv.one_se
        if report.holdout is not None:
            rr.holdout_mse = holdout_report(accs, path.coef.T, True)[0] / accs.n_holdout
        if rr.chosen is not None:
            how = {"min": "least CV error", "1se": "one-standard-error rule"}[ridge_rule] \
                if rr.cv_mean is not None else "least holdout error"
            rr.chosen_fit = ridge_fit_result(fit, train, float(lam[rr.chosen]), how)
        else:
            report.notes.append("no folds or holdout, so no ridge penalty was chosen (the path is shown)")
        report.ridge = rr
    if select:
        sel = run_selection(train.R, train.n_used, names, spec.intercept, select, criterion, folds,
                            categorical=spec.categorical)
        report.selection = selection_report(sel, design)
        report.cautions.append(SELECTION_CAUTION)
    if compare:
        from tallfit.solve.nested import nested_f_test

        for added in compare:
            base = [t for t in fit.terms if t not in added]
            report.nested.append(nested_f_test(train.R, train.n_used, names, base, list(added)).to_dict())
    return report
