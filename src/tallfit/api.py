"""The Python face of tallfit: fit, predict, load, save.

>>> import tallfit                                                    # doctest: +SKIP
>>> model = tallfit.fit("telemetry/*.parquet", target="power_w",
...                     features=["cpu_util", "inlet_temp_c"])       # doctest: +SKIP
>>> print(model.summary())                                           # doctest: +SKIP
>>> tallfit.predict(model, "new/*.parquet", out="pred.parquet")      # doctest: +SKIP
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

from tallfit.design.build import make_spec
from tallfit.design.categorical import WIDE_LEVELS
from tallfit.design.coding import finalize_coding
from tallfit.design.design import Design
from tallfit.engine import local
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook
from tallfit.modelfile import load_model, save_model
from tallfit.results import FitResult
from tallfit.solve.exact import DEFAULT_RANK_TOL
from tallfit.solve.model import fit_from_accumulator
from tallfit.inputs import as_source


def fit(
    data: Any,
    target: str,
    features: Sequence[str],
    *,
    intercept: bool = True,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    drop_aliased: bool = False,
    refine: bool | int = False,
    conf_level: float = 0.95,
    rank_tol: float = DEFAULT_RANK_TOL,
    format: str | None = None,
    delimiter: str = ",",
    progress: ProgressHook | None = None,
    categorical: Sequence[str] = (),
    derive: Sequence[str] = (),
    interactions: Sequence[str] = (),
    polynomials: dict[str, int] | None = None,
    where: str | None = None,
    weights: str | None = None,
    weight_kind: str = "analytic",
    missing: dict[str, str] | None = None,
    reference: dict[str, str] | None = None,
    min_level_count: int | None = None,
    max_levels: int | None = None,
) -> FitResult:
    """Fit ``target ~ features`` by exact least squares, streaming the data once.

    Parameters
    ----------
    data
        A path, directory, glob or list of them (Parquet, CSV, JSON lines, Arrow IPC); a pyarrow
        Table; an iterable of pyarrow RecordBatches (or a callable returning a fresh one, needed
        for ``refine``).
    target, features
        The column to explain and the numeric columns that explain it.
    intercept
        Lead the design with a constant column (default). Without it R² is uncentred.
    batch_rows
        Rows per record batch read; memory is a few batches of this size.
    drop_aliased
        Fit without terms that are linear combinations of earlier ones (reported in the result)
        instead of stopping with an error naming them.
    refine
        Number of refinement passes (True means 2): each re-reads the data and corrects the
        coefficients with residuals computed in double-double arithmetic.
    conf_level
        Level of the confidence intervals.
    rank_tol
        Sine of the angle below which a term counts as a combination of earlier terms.
    categorical
        Columns (string, dictionary, boolean or integer) entered as indicator columns against a
        reference level; levels are discovered while streaming.
    derive, interactions, polynomials
        Derived features: ``"NAME = SQL expression"`` strings; all pairwise products of the
        listed columns; ``{column: degree}`` powers 2..degree.
    where
        SQL condition selecting the rows used.
    weights, weight_kind
        Weight column; ``"analytic"`` (precision weights: each row one observation) or
        ``"frequency"`` (a row of weight w stands for w rows).
    missing
        Per-column policy for missing/non-finite values: ``"drop"`` (default), ``"fail"``,
        ``"fill:VALUE"``, ``"indicator[:VALUE]"`` (fill and add a 0/1 column); key ``"*"`` for all.
    reference, min_level_count, max_levels
        Reference level per categorical column (default: the most frequent); levels with fewer
        rows, or beyond the most frequent ``max_levels``, are merged into one "(other)" level.
    """
    spec = make_spec(
        target, features, intercept=intercept, categorical=categorical, derive=derive,
        interactions=interactions, polynomials=polynomials, where=where, weights=weights,
        weight_kind=weight_kind, missing=missing,
    )
    if int(batch_rows) < 1:
        raise ValueError("batch_rows must be at least 1")
    source = as_source(data, format=format, delimiter=delimiter)
    design = Design(spec)
    acc = local.accumulate(source, spec, batch_rows, progress, design=design)
    acc, coding = finalize_coding(acc, spec, reference, min_level_count, max_levels)
    notes = [
        f"categorical column {c!r} has more than {WIDE_LEVELS} levels as dense indicator columns; "
        "a key of that many values is better absorbed (fixed effects) than expanded"
        for c in design.wide_categoricals()
    ]
    options = {
        "min_level_count": min_level_count,
        "max_levels": max_levels,
        "batch_rows": int(batch_rows),
        "drop_aliased": bool(drop_aliased),
        "rank_tol": float(rank_tol),
        "conf_level": float(conf_level),
    }
    common = dict(
        on_aliased="drop" if drop_aliased else "error",
        rank_tol=rank_tol,
        conf_level=conf_level,
        source={"description": source.describe(), **source.fingerprint()},
        options=options,
    )
    common["coding"] = coding
    result = fit_from_accumulator(spec, acc, **common)
    result.warnings.extend(notes)
    passes = 2 if refine is True else int(refine)
    if passes > 0:
        result = _refined(source, spec, acc, result, passes, batch_rows, progress, common)
    return result


def _refined(source, spec, acc, first: FitResult, passes, batch_rows, progress, common) -> FitResult:
    import numpy as np

    from tallfit.solve.exact import solve_exact
    from tallfit.solve.refine import refine as refine_beta

    sol = solve_exact(acc.R, acc.names, common["rank_tol"])

    def one_pass(b_hi, b_lo):
        return local.residual_products_pass(
            source, spec, sol.keep, b_hi, b_lo, batch_rows, progress, coding=common.get("coding")
        )

    beta, info, digits = refine_beta(one_pass, sol.R11, sol.beta, passes)
    result = fit_from_accumulator(
        spec, acc, beta=beta, rss=info["rss_double_double"], refinement=info, **common
    )
    result.digits = np.asarray(digits)
    result.solver = "householder-tsqr+refinement"
    return result


def predict(model: FitResult | str | os.PathLike, data: Any, **kwargs: Any):
    """Stream predictions for new data; see :func:`tallfit.scoring.predict` for the options."""
    from tallfit.scoring import predict as _predict

    if not isinstance(model, FitResult):
        model = load_model(model)
    return _predict(model, data, **kwargs)


def load(path: str | os.PathLike) -> FitResult:
    """Load a model file written by :func:`save` or ``tallfit fit --out``."""
    return load_model(path)


def save(model: FitResult, path: str | os.PathLike) -> None:
    """Write a model file atomically."""
    save_model(model, path)
