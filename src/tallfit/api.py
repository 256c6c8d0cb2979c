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
from tallfit.engine.levels_pass import structured_applies, structured_pass
from tallfit.engine.passes import apply_method_report
from tallfit.modelfile import load_model, save_model
from tallfit.results import FitResult
from tallfit.solve.exact import DEFAULT_RANK_TOL
from tallfit.solve.model import fit_from_accumulator
from tallfit.inputs import as_source
from tallfit.fitting import cluster_list, with_robust, fit_by_group, attach_effects, refined, fit_iterative


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
    merge_levels: dict[str, dict[str, list[str]]] | None = None,
    drop_levels: dict[str, Sequence[str]] | None = None,
    absorb: str | None = None,
    by: Sequence[str] = (),
    solver: str = "exact",
    solver_options: dict[str, Any] | None = None,
    robust: str | None = None,
    cluster: str | Sequence[str] | None = None,
    workers: int | None = None,
    method: str = "qr",
    scheduler: Any = None,
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
    merge_levels
        Levels merged by name before that: ``{column: {new_level: [old_level, ...]}}``.
    drop_levels
        Levels whose rows leave the fit, by name: ``{column: [level, ...]}``; decided after the
        pass (the factor is recoded; equal to a fit without those rows).
    solver, solver_options
        ``"exact"`` (default), or an iterative solver (``"gd"``, ``"cg"``, ``"lbfgs"``, ``"sgd"``;
        see ``tallfit.solve.iterative``) run after the factor pass, one more pass per iteration or
        epoch (so the data must be readable again: a path, a Table or a callable), with its options
        as a dict, plus ``cache`` (bool) and ``spill_dir`` for a local cache of the decoded design.
        The result's notes say how far it is from the exact answer.
    robust, cluster
        ``"HC0"``…``"HC3"`` (or ``"all"``: the four, a slower pass) and/or one or two key columns
        (``"host_id"`` or ``"host_id,day"``): one more pass computes robust (clustered) standard
        errors, kept in ``result.robust`` and shown beside the plain ones (see
        ``tallfit.solve.robust``).
    workers
        Threads that read and fold in parallel (default: every core); results agree to rounding
        whatever the number.
    method
        ``"qr"`` (default): the stable Householder factor. ``"gram"``: the faster co-moment path,
        which loses about twice as many digits to ill-conditioning and warns when few are left;
        ``"auto"``: the Gram path, replaced by a stable pass when its estimate says it is unsafe
        (see ``tallfit.engine.passes``).
    scheduler
        Run the passes over parts on a dask.distributed cluster: a ``Client``, a scheduler address
        (``"tcp://host:8786"``) or ``"local"`` (one worker process per core here). Each worker
        reads its parts (files, runs of Parquet row groups) itself, so they must reach the files;
        the answer is the local one, bit for bit (see ``tallfit.engine.cluster``).
    """
    if scheduler is not None:
        return _on_cluster(fit, dict(locals()))
    spec = make_spec(
        target, features, intercept=intercept, categorical=categorical, derive=derive,
        interactions=interactions, polynomials=polynomials, where=where, weights=weights,
        weight_kind=weight_kind, missing=missing, absorb=absorb, by=by,
    )
    if int(batch_rows) < 1:
        raise ValueError("batch_rows must be at least 1")
    source = as_source(data, format=format, delimiter=delimiter)
    if absorb and (refine or solver != "exact"):
        from tallfit.errors import DesignError

        raise DesignError(
            "an absorbed key works with the exact solver, without refinement passes; "
            "drop --refine/--solver or the --absorb key"
        )
    if spec.by:
        if refine or solver != "exact" or absorb:
            from tallfit.errors import DesignError

            raise DesignError(
                "per-group models (--by) are fitted exactly, without refinement or absorbed keys; "
                "drop those options or fit one group at a time"
            )
        grouped = fit_by_group(source, spec, Design(spec), batch_rows, progress, drop_aliased, rank_tol,
                               conf_level, reference, min_level_count, max_levels, merge_levels, drop_levels)
        if robust or cluster:  # one more pass, each row to its group's sums (engine/grouped_pass.py)
            from tallfit.engine.grouped_pass import grouped_robust

            grouped_robust(grouped, source, robust=robust, cluster=cluster_list(cluster), batch_rows=batch_rows,
                           progress=progress)
        return grouped
    structured = method == "qr" and structured_applies(spec)
    if structured:  # level statistics instead of dense indicator columns (engine/levels_pass.py)
        design = Design(spec, structured=True)
        raw = structured_pass(source, spec, batch_rows, progress, design, workers=workers)
    else:
        design = Design(spec)
        raw = local.accumulate(source, spec, batch_rows, progress, design=design, workers=workers, method=method)
    absorber = raw if spec.absorb else None
    acc = absorber.inner if absorber else raw
    acc, coding, T = finalize_coding(acc, spec, reference, min_level_count, max_levels, merge_levels,
                                     drop_levels)
    notes = [
        f"categorical column {c!r} has more than {WIDE_LEVELS} levels as dense indicator columns; "
        "a key of that many values is better absorbed (fixed effects) than expanded"
        for c in design.wide_categoricals()
    ] if not structured else []
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
    if solver != "exact":
        result = fit_iterative(source, spec, acc, common, notes, solver, solver_options, batch_rows, progress, refine)
        return with_robust(result, source, robust, cluster, batch_rows, progress)
    absorbed = None
    if absorber is not None:
        absorbed = {"column": spec.absorb, "levels": absorber.n_levels, "total_ss": absorber.total_ss()}
    result = fit_from_accumulator(spec, acc, absorbed=absorbed, **common)
    result.warnings.extend(notes)
    apply_method_report(result, raw)
    if absorber is not None:
        attach_effects(result, absorber, T, absorbed)
    passes = 2 if refine is True else int(refine)
    if passes > 0:
        result = refined(source, spec, acc, result, passes, batch_rows, progress, common)
    return with_robust(result, source, robust, cluster, batch_rows, progress)


def _on_cluster(fn, kwargs: dict):
    """``fn(**kwargs)`` with its passes over parts on the cluster ``kwargs["scheduler"]``; a
    result says where it ran (and why not, when nothing could be sent: data not in files, or one part)."""
    from tallfit.engine.cluster import on_cluster

    with on_cluster(kwargs.pop("scheduler")) as run:
        out = fn(**kwargs, scheduler=None)
    where = out["model"] if isinstance(out, dict) else getattr(out, "fit", out)  # a ValidationReport's fit
    models = list(where.groups.values()) if hasattr(where, "groups") else [where]
    for m in models:
        m.options["cluster"] = {"scheduler": run.address, "passes": run.passes, "parts": run.parts}
        if run.parts == 0:
            why = run.kept_here or ("the data is one part or not in files, so it was read here (give the "
                                    "workers files or URIs they can reach)")
            m.warnings.append(f"nothing ran on the cluster at {run.address}: {why}")
    return out


def diagnose(
    model: FitResult | str | os.PathLike,
    data: Any,
    *,
    robust: str | None = "HC3",
    cluster: str | Sequence[str] | None = None,
    keep: Sequence[str] = (),
    bins: int = 20,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    format: str | None = None,
    delimiter: str = ",",
    progress: ProgressHook | None = None,
    group: str | None = None,
    scheduler: Any = None,
) -> dict[str, Any]:
    """One more pass with a fitted model: robust errors and residual diagnostics.

    Returns ``{"model": FitResult (with .robust set when ``data`` is the fitting data),
    "diagnostics": dict}``; ``tallfit.render.report.write_report`` turns it into a report.
    For per-group models (``by``), ``group`` names the group to check (its key as the summary
    shows it, e.g. ``"north-1"``, or ``"north-1 | compute-a"`` for two grouping columns); the pass
    then reads only that group's rows. Without ``group`` every group is checked in one pass (up
    to ``REPORT_GROUPS`` groups): the result is then ``{"model": GroupedFit, "groups": {key:
    {"model", "diagnostics"}}}``. ``scheduler``: run the pass on a dask cluster (see ``fit``; the
    every-group pass runs here).
    """
    if scheduler is not None:
        return _on_cluster(diagnose, dict(locals()))
    from tallfit.diagnostics.assemble import build_diagnostics, same_data
    from tallfit.engine.second_pass import second_pass
    from tallfit.solve.robust import check_kind, robust_for_model

    check_kind(robust)
    from tallfit.errors import DesignError
    from tallfit.grouped import GroupedFit

    if not isinstance(model, (FitResult, GroupedFit)):
        model = load_model(model)
    source = as_source(data, format=format, delimiter=delimiter)
    if isinstance(model, GroupedFit):
        if group is None:
            return _diagnose_groups(model, source, robust=robust, cluster=cluster_list(cluster), keep=list(keep),
                                    bins=bins, batch_rows=batch_rows, progress=progress)
        model = model.group(group, source.schema)
    elif group is not None:
        raise DesignError(f"--group {group!r}: this model is one model, not one per group")
    sp = second_pass(model, source, cluster=cluster_list(cluster), keep=list(keep), robust=robust,
                     batch_rows=batch_rows, progress=progress)
    if sp.n_used == 0:
        only = f" (only group {group!r}'s rows are read)" if group is not None else ""
        raise DesignError(
            f"nothing to check in {source.describe()}: {sp.n_read:,} rows read{only}, none usable by this model "
            "(rows with a missing value in a model column are dropped); give the data the model was fitted on"
        )
    if same_data(model, sp):
        model.robust = robust_for_model(model, sp.sandwich, sp.clusters, robust, swept=sp.levels_used)
    diag = build_diagnostics(model, sp, bins=bins, robust=model.robust)
    return {"model": model, "diagnostics": diag, "source": source.describe()}


#: Every group is checked in one pass up to this many groups (each keeps ≈ 0.7 MB of histograms);
#: beyond it, one group at a time (--group).
REPORT_GROUPS = 50


def _diagnose_groups(grouped, source, *, robust, cluster, keep, bins, batch_rows, progress) -> dict[str, Any]:
    """``diagnose`` of every group of a per-group model from one pass (engine.grouped_pass)."""
    from tallfit.diagnostics.assemble import build_diagnostics, same_data
    from tallfit.engine.grouped_pass import grouped_second_pass
    from tallfit.errors import DesignError
    from tallfit.solve.robust import robust_for_model

    if len(grouped.groups) > REPORT_GROUPS:
        shown = ", ".join(repr(k) for k in list(grouped.groups)[:5]) + ", …"
        raise DesignError(
            f"this model has one model per {', '.join(grouped.by)} ({len(grouped.groups)} groups, more than the "
            f"{REPORT_GROUPS} one report checks at once): name the group to check with --group (group=), one of {shown}"
        )
    from tallfit.engine.cluster import current

    run = current()
    if run is not None:
        run.kept_here = ("checking every group at once reads the data here; name one group (--group) to "
                         "check it on the cluster")
    passes = grouped_second_pass(grouped, source, cluster=cluster, keep=keep, robust=robust, batch_rows=batch_rows,
                                 progress=progress)
    checked, unchecked = {}, {}
    for key, sp in passes.items():
        if sp.n_used == 0:
            unchecked[key] = "no usable rows in this data"
            continue
        model = grouped.groups[key]
        if same_data(model, sp):
            model.robust = robust_for_model(model, sp.sandwich, sp.clusters, robust, swept=sp.levels_used)
        checked[key] = {"model": model, "diagnostics": build_diagnostics(model, sp, bins=bins, robust=model.robust)}
    if not checked:
        raise DesignError(f"nothing to check in {source.describe()}: no group of this model has a usable row there; "
                          "give the data the model was fitted on")
    return {"model": grouped, "groups": checked, "unchecked": unchecked, "source": source.describe()}


def predict(model: FitResult | str | os.PathLike, data: Any, **kwargs: Any):
    """Stream predictions for new data; see :func:`tallfit.scoring.predict` for the options."""
    from tallfit.scoring import predict as _predict

    from tallfit.grouped import GroupedFit

    if not isinstance(model, (FitResult, GroupedFit)):
        model = load_model(model)
    return _predict(model, data, **kwargs)


def load(path: str | os.PathLike) -> FitResult:
    """Load a model file written by :func:`save` or ``tallfit fit --out``."""
    return load_model(path)


def save(model: FitResult, path: str | os.PathLike) -> None:
    """Write a model file atomically."""
    save_model(model, path)


def validate(
    data: Any,
    target: str,
    features: Sequence[str],
    *,
    folds: int = 10,
    fold_key: str | None = None,
    holdout: float = 0.0,
    holdout_key: str | None = None,
    seed: int = 0,
    ridge: str | Sequence[float] | None = None,
    ridge_count: int = 50,
    ridge_rule: str = "min",
    select: str | None = None,
    criterion: str = "bic",
    compare: Sequence[Sequence[str]] = (),
    mae: bool = False,
    intercept: bool = True,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    drop_aliased: bool = False,
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
    missing: dict[str, str] | None = None,
    reference: dict[str, str] | None = None,
    min_level_count: int | None = None,
    max_levels: int | None = None,
    merge_levels: dict[str, dict[str, list[str]]] | None = None,
    weights: str | None = None,
    weight_kind: str = "analytic",
    absorb: str | None = None,
    by: Sequence[str] = (),
    drop_levels: dict[str, Sequence[str]] | None = None,
    scheduler: Any = None,
):
    """Fit on the training rows and measure prediction error on rows not fitted, in one pass.

    Rows go to a holdout (``holdout`` fraction, by a hash of ``holdout_key`` or of the row
    position) and to ``folds`` cross-validation folds (by ``fold_key`` or position), with
    ``seed``. ``ridge`` ("auto" for a log grid of ``ridge_count`` penalties, or a list) adds a
    ridge path chosen by ``ridge_rule`` ("min" or "1se"); ``select`` ("forward", "backward",
    "best") searches terms by ``criterion`` ("aic", "bic", "adj_r2", "cv"); each entry of
    ``compare`` is a list of terms given an F test against the model without them. ``mae``
    adds a second pass for the holdout's mean absolute error. The design options are those of
    :func:`fit` (weights, absorbed keys and iterative solvers are not offered here), and so is
    ``scheduler`` (the split pass on a dask cluster). Returns a ValidationReport.
    """
    if scheduler is not None:
        return _on_cluster(validate, dict(locals()))
    from tallfit.accumulate.folds import FoldPlan
    from tallfit.engine.split import absolute_error_pass, accumulate_split, finalize_split
    from tallfit.errors import DesignError
    from tallfit.validation import build_validation, full_coef

    unsupported = [name for name, v in (("weights", weights), ("absorb", absorb), ("by", by),
                                        ("drop_levels", drop_levels)) if v]
    if unsupported:
        raise DesignError(
            f"validation does not take {', '.join(unsupported)} yet; validate the unweighted model "
            "without absorbed keys or per-group models, or use fit for those"
        )
    del weight_kind
    spec = make_spec(
        target, features, intercept=intercept, categorical=categorical, derive=derive,
        interactions=interactions, polynomials=polynomials, where=where, missing=missing,
    )
    if int(batch_rows) < 1:
        raise ValueError("batch_rows must be at least 1")
    plan = FoldPlan(folds=folds, fold_key=fold_key, holdout=holdout, holdout_key=holdout_key, seed=seed)
    source = as_source(data, format=format, delimiter=delimiter)
    accs = accumulate_split(source, spec, plan, batch_rows, progress)
    accs, coding = finalize_split(accs, spec, reference, min_level_count, max_levels, merge_levels)
    options = {"batch_rows": int(batch_rows), "drop_aliased": bool(drop_aliased), "rank_tol": float(rank_tol),
               "conf_level": float(conf_level), "min_level_count": min_level_count, "max_levels": max_levels,
               "split": plan.to_dict()}
    fit_options = dict(on_aliased="drop" if drop_aliased else "error", rank_tol=rank_tol, conf_level=conf_level,
                       source={"description": source.describe(), **source.fingerprint()}, options=options,
                       coding=coding)
    report = build_validation(spec, accs, fit_options=fit_options, ridge=ridge, ridge_count=ridge_count,
                              ridge_rule=ridge_rule, select=select, criterion=criterion,
                              compare=[list(c) for c in compare])
    if mae and report.holdout is not None:
        import numpy as np

        models = [full_coef(report.fit)]
        if report.ridge is not None and report.ridge.chosen_fit is not None:
            models.append(report.ridge.chosen_fit.inference.estimate)
        sae, _ = absolute_error_pass(source, spec, plan, np.column_stack(models), batch_rows, progress, coding)
        report.holdout.sae = float(sae[0])
        if len(models) > 1:
            report.ridge.holdout_mae = float(sae[1] / report.holdout.n)
    return report
