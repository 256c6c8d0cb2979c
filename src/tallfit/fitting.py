"""The steps of :func:`tallfit.api.fit` after its first pass: refinement, iterative solvers,
robust errors, absorbed-key effects and per-group models (kept apart so api.py stays the face)."""

from __future__ import annotations

from collections.abc import Sequence

from tallfit.design.coding import finalize_coding
from tallfit.engine import local
from tallfit.results import FitResult
from tallfit.solve.model import fit_from_accumulator


def cluster_list(cluster: str | Sequence[str] | None) -> list[str]:
    if not cluster:
        return []
    return [c.strip() for c in cluster.split(",") if c.strip()] if isinstance(cluster, str) else list(cluster)


def with_robust(result: FitResult, source, robust, cluster, batch_rows, progress) -> FitResult:
    """Run the second pass for robust / clustered errors when asked (see tallfit.solve.robust)."""
    if not robust and not cluster:
        return result
    from tallfit.engine.second_pass import second_pass
    from tallfit.solve.robust import check_kind, robust_for_model

    check_kind(robust)
    sp = second_pass(result, source, cluster=cluster_list(cluster), robust=robust, diagnostics=False,
                     batch_rows=batch_rows, progress=progress)
    result.robust = robust_for_model(result, sp.sandwich, sp.clusters, robust, swept=sp.levels_used)
    return result


def fit_by_group(source, spec, design, batch_rows, progress, drop_aliased, rank_tol, conf_level,
                  reference, min_level_count, max_levels, merge_levels=None, drop_levels=None):
    """One model per value of the ``by`` columns, from one pass (see tallfit.grouped)."""
    from tallfit.grouped import fit_groups

    options = {"batch_rows": int(batch_rows), "drop_aliased": bool(drop_aliased),
               "rank_tol": float(rank_tol), "conf_level": float(conf_level)}

    def finalize(acc):
        acc, coding, _ = finalize_coding(acc, spec, reference, min_level_count, max_levels, merge_levels,
                                         drop_levels)
        return fit_from_accumulator(spec, acc, on_aliased="drop" if drop_aliased else "error",
                                    rank_tol=rank_tol, conf_level=conf_level, coding=coding, options=options)

    grouped = fit_groups(source, spec, batch_rows, progress, design, finalize)
    grouped.options = options
    grouped.source = {"description": source.describe(), **source.fingerprint()}
    return grouped


def attach_effects(result: FitResult, absorber, T, absorbed: dict) -> None:
    """Store the absorbed level effects α_g = ȳ_g − x̄_gᵀβ in the model's coding (for prediction),
    with each level's size and term means (for the second pass)."""
    import numpy as np

    acc = result.accumulator
    keep = [acc.names.index(t) for t in result.terms]
    # α = M_c[:, y] − M_c[:, keep] β with the coded means M_c = M T: one product of the raw
    # level means M with c = T[:, y] − T[:, keep] β
    T = np.eye(len(acc.names)) if T is None else T
    c = T[:, -1] - T[:, keep] @ result.inference.estimate
    alpha = absorber.raw_means_dot(c)
    means = absorber.raw_means_dot(T[:, keep])  # each level's means of the model's terms
    index = absorber.coder.index  # level → id
    ids = np.fromiter(index.values(), dtype=np.int64, count=len(index))
    counts = absorber.counts
    seen = counts[ids] > 0
    used = ids[seen]
    labels = [lvl for lvl, keep in zip(index, seen.tolist()) if keep]
    effects = dict(zip(labels, alpha[used].tolist()))
    mean_effect = float(np.sum(alpha[used] * counts[used]) / counts[used].sum())
    coding = result.coding or {"names": list(acc.names), "columns": {}}
    coding["absorbed"] = {
        "column": absorbed["column"],
        "levels": int(absorbed["levels"]),
        "r_squared_within": absorbed.get("r_squared_within"),
        "mean_effect": mean_effect,
        "effects": effects,
        # per level, in the order of "effects": its rows (weight sum when weighted) and its means
        # of the terms, which the second pass centres rows on (leverage 1/n_g + ‖zᵢ‖²)
        "sizes": counts[used].tolist(),
        # levels × terms (packed in model files); no copy when every level id is used, in order
        "means": means if np.array_equal(used, np.arange(means.shape[0])) else means[used],
    }
    result.coding = coding


def refined(source, spec, acc, first: FitResult, passes, batch_rows, progress, common) -> FitResult:
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


def fit_iterative(source, spec, acc, common, notes, solver, solver_options, batch_rows, progress,
                   refine) -> FitResult:
    """An iterative solver after the factor pass (see tallfit.solve.iterative.driver)."""
    from tallfit.engine.cache import DesignPasses
    from tallfit.errors import DesignError
    from tallfit.solve.iterative.driver import fit_iterative

    if refine:
        raise DesignError("refinement applies to the exact solver only; drop refine (--refine) or use solver exact")
    opts = dict(solver_options or {})
    cache, spill_dir = bool(opts.pop("cache", False)), opts.pop("spill_dir", None)
    with DesignPasses(source, spec, batch_rows, progress, coding=common.get("coding"), cache=cache,
                      spill_dir=spill_dir) as passes:
        result = fit_iterative(spec, acc, passes, solver, opts, **common)
    result.iterations["cache"] = passes.cache_info  # after close: where it was, its size, "removed"
    result.warnings.extend(notes)
    from tallfit.engine.cluster import current

    if current() is not None:
        result.warnings.append(f"the {solver} solver's {passes.passes} passes read the data here, not on the cluster "
                               "(only the factor pass ran there)")
    return result
