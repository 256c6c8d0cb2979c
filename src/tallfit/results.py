"""The fitted-model value: terms, estimates, covariance, fit statistics and provenance.

A :class:`FitResult` is built once from the accumulator (see ``solve``) and is what every face
shows: the summary, ``--json``, the model file and prediction. ``to_dict`` is the JSON contract
documented in the README.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tallfit.accumulate.factor import FactorAccumulator
from tallfit.design.spec import ModelSpec
from tallfit.solve.exact import Alias, ExactSolution
from tallfit.solve.inference import Inference


@dataclass
class FitResult:
    """A fitted linear model with its inference and the state needed to merge or update it."""

    spec: ModelSpec
    terms: list[str]  # kept design terms, in design order
    inference: Inference
    aliased: list[Alias]
    accumulator: FactorAccumulator
    condition_number: float
    digits: np.ndarray  # estimated significant digits per term
    solver: str = "householder-tsqr"
    refinement: dict[str, Any] | None = None
    source: dict[str, Any] = field(default_factory=dict)
    options: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    robust: dict[str, Any] | None = None  # robust / clustered errors from a second pass (solve/robust.py)
    iterations: dict[str, Any] | None = None  # an iterative solver's settings, stop reason and history
    coding: dict[str, Any] | None = None  # final coding of categorical columns (design/coding.py)

    # -- convenient views -------------------------------------------------------------------
    @property
    def coef(self) -> dict[str, float]:
        """Estimates by term name."""
        return {t: float(b) for t, b in zip(self.terms, self.inference.estimate)}

    @property
    def trusted_digits(self) -> float:
        return float(self.digits.min()) if self.digits.size else 15.9

    @property
    def dropped_rows(self) -> dict[str, Any]:
        acc = self.accumulator
        return {"total": int(acc.n_dropped), "by_column": dict(acc.dropped_by_column)}

    def feature_ranges(self) -> dict[str, tuple[float, float]]:
        """Observed [min, max] of each feature over the used rows."""
        acc = self.accumulator
        idx = {name: i for i, name in enumerate(acc.names)}
        return {f: (float(acc.col_min[idx[f]]), float(acc.col_max[idx[f]])) for f in self.spec.features}

    def weights_info(self) -> dict[str, Any] | None:
        spec, acc = self.spec, self.accumulator
        if not spec.weights:
            return None
        return {"column": spec.weights, "kind": spec.weight_kind, "sum": acc.weight_sum}

    def levels_info(self) -> dict[str, Any]:
        """Per categorical column: reference level, merged levels, and rows per level."""
        if not self.coding:
            return {}
        return {
            col: {"reference": c["reference"], "merged_into_other": c["merged"], "counts": c["counts"]}
            for col, c in self.coding["columns"].items()
        }

    def collinearity(self):
        """VIFs, standardised estimates and the standardised design's condition (solve/collinearity.py)."""
        from tallfit.solve.collinearity import collinearity
        from tallfit.solve.exact import reduce_factor

        names = self.accumulator.names[:-1]
        Rk = reduce_factor(self.accumulator.R, [names.index(t) for t in self.terms])
        has_intercept = bool(self.terms) and self.terms[0] == "(intercept)"
        return collinearity(Rk, list(self.terms), self.inference.estimate, has_intercept, self.inference.n_used,
                            within=bool(self.spec.absorb))

    def term_table(self) -> list[dict[str, Any]]:
        inf = self.inference
        col = self.collinearity()
        vif = dict(zip(col.terms, col.vif))
        std = dict(zip(col.terms, col.std_estimate)) if col.std_estimate is not None else {}
        return [
            {
                "name": name,
                "estimate": float(inf.estimate[i]),
                "std_error": float(inf.std_error[i]),
                "t": float(inf.t[i]),
                "p_value": float(inf.p_value[i]),
                "ci_low": float(inf.ci_low[i]),
                "ci_high": float(inf.ci_high[i]),
                "digits": round(float(self.digits[i]), 1),
                "vif": float(vif[name]) if name in vif else None,
                "std_estimate": float(std[name]) if name in std else None,
            }
            for i, name in enumerate(self.terms)
        ]

    def absorbed_info(self) -> dict[str, Any] | None:
        """The absorbed key: column, levels, R² within levels and the rows' mean effect (the
        effects themselves stay in the model file)."""
        a = (self.coding or {}).get("absorbed")
        if not a:
            return None
        return {"column": a["column"], "levels": int(a["levels"]), "r_squared_within": a.get("r_squared_within"),
                "mean_effect": a.get("mean_effect")}

    def to_dict(self) -> dict[str, Any]:
        """The machine-readable result (the ``show --json`` contract)."""
        inf = self.inference
        return {
            "target": self.spec.target,
            "intercept": self.spec.intercept,
            "terms": self.term_table(),
            "conf_level": inf.conf_level,
            "n_read": int(self.accumulator.n_read),
            "n_used": inf.n_used,
            "dropped_rows": self.dropped_rows,
            "df_model": inf.df_model,
            "df_resid": inf.df_resid,
            "residual_std": inf.residual_std,
            "rss": inf.rss,
            "tss": inf.tss,
            "r_squared": inf.r_squared,
            "r_squared_kind": "centered" if inf.centered else "uncentered",
            "adj_r_squared": inf.adj_r_squared,
            "f_statistic": inf.f_statistic,
            "f_p_value": inf.f_p_value,
            "log_likelihood": inf.log_likelihood,
            "aic": inf.aic,
            "bic": inf.bic,
            "covariance": [[float(v) for v in row] for row in inf.cov],
            "aliased_terms": [{"term": a.term, "relation": a.describe()} for a in self.aliased],
            "condition_number": self.condition_number,
            "trusted_digits": round(self.trusted_digits, 1),
            "solver": self.solver,
            "refinement": self.refinement,
            "iterations": self.iterations,
            "feature_ranges": {k: list(v) for k, v in self.feature_ranges().items()},
            "source": self.source,
            "weights": self.weights_info(),
            "levels": self.levels_info(),
            "absorbed": self.absorbed_info(),
            "filled_values": dict(self.accumulator.filled),
            "warnings": list(self.warnings),
            "robust": self.robust,
            "collinearity": self.collinearity().to_dict(),
        }

    def summary(self) -> str:
        """The human summary as plain text."""
        from tallfit.render.summary import render_text

        return render_text(self)

    def predict(self, data, **kwargs):
        """Predictions for new data; see :func:`tallfit.predict`."""
        from tallfit.scoring import predict

        return predict(self, data, **kwargs)

    def save(self, path) -> None:
        from tallfit.modelfile import save_model

        save_model(self, path)


def build_result(
    spec: ModelSpec,
    acc: FactorAccumulator,
    sol: ExactSolution,
    inference: Inference,
    **extra: Any,
) -> FitResult:
    """Assemble a FitResult from the pieces the solvers produced."""
    names = acc.names[:-1]
    return FitResult(
        spec=spec,
        terms=[names[j] for j in sol.keep],
        inference=inference,
        aliased=list(sol.aliases),
        accumulator=acc,
        condition_number=float(sol.condition),
        digits=np.asarray(sol.digits, dtype=float),
        **extra,
    )
