"""The human summary of a fitted model (plain text, our own layout)."""

from __future__ import annotations

from tallfit.render.numbers import count, pval, sig, table
from tallfit.results import FitResult

RULE = "─" * 78


def _effects(result: FitResult) -> list[str]:
    inf = result.inference
    level = f"{inf.conf_level:.0%}"
    rows = [("term", "estimate", "std.err", f"{level} interval", "t", "p", "digits")]
    for i, name in enumerate(result.terms):
        rows.append(
            (
                name,
                sig(inf.estimate[i], 7),
                sig(inf.std_error[i], 3),
                f"{sig(inf.ci_low[i], 6)} … {sig(inf.ci_high[i], 6)}",
                sig(inf.t[i], 4),
                pval(inf.p_value[i]),
                f"{result.digits[i]:.0f}",
            )
        )
    return table(rows)


def _robust_lines(result: FitResult) -> list[str]:
    """Robust (or clustered) errors beside the plain ones, when a second pass computed them."""
    r = result.robust
    if not r:
        return []
    est = r["estimators"][r["selected"]]
    level = f"{r['conf_level']:.0%}"
    rows = [("term", "std.err", r["selected"], "ratio", "p", f"{level} interval")]
    for i, name in enumerate(result.terms):
        se, plain = est["std_error"][i], result.inference.std_error[i]
        rows.append((name, sig(plain, 3), sig(se, 3), f"{se / plain:.2f}" if plain else "—",
                     pval(est["p_value"][i]), f"{sig(est['ci_low'][i], 6)} … {sig(est['ci_high'][i], 6)}"))
    widths = [max(len(row[c]) for row in rows) for c in range(len(rows[0]))]
    out = ["", f"robust    {r['selected']} errors beside the plain ones (t on {count(est['df'])} df)"]
    out += ["  " + "  ".join([row[0].ljust(widths[0])] + [row[c].rjust(widths[c]) for c in range(1, len(row))])
            for row in rows]
    out.extend(f"  ! {note}" for note in r.get("notes", []))
    return out


def _cautions(result: FitResult) -> list[str]:
    k = len(result.terms) - (1 if result.spec.intercept else 0)
    selected = (result.robust or {}).get("selected", "")
    if selected.startswith("cluster:"):
        errors = ["std.err assumes independent rows of equal noise; the clustered errors allow noise",
                  "  that is unequal and dependent within a cluster, not across clusters"]
    elif selected:
        errors = [f"std.err assumes independent rows of equal noise; {selected} allows unequal noise but",
                  "  still assumes independent rows (log rows rarely are: cluster them, e.g. by host)"]
    else:
        errors = ["std.err assumes independent rows of equal noise; log rows are rarely independent, so",
                  "  these errors are likely too small (robust or clustered errors need a second pass)"]
    lines = [
        "association, not causation: an estimate is the change in the target that goes with a unit",
        "  change of the term in these data, others held fixed, not what an intervention would do",
        *errors,
        "predictions outside the fitted range of the features (see feature ranges) extrapolate",
    ]
    if k > 1:
        lines.append(
            f"{k} terms tested at once: about {0.05 * k:.1f} would pass p < 0.05 by chance alone if none "
            "mattered;"
        )
        lines.append("  adjust (Holm, Benjamini–Hochberg) before screening many terms")
    return lines


def _design_lines(result: FitResult) -> list[str]:
    """Filter, derived terms, weights, filled values and categorical codings, when present."""
    spec, acc = result.spec, result.accumulator
    lines = []
    if spec.where:
        lines.append(f"rows used where {spec.where}")
    for name, expr in spec.derive:
        lines.append(f"derived {name} = {expr}")
    if spec.weights:
        lines.append(f"weights {spec.weights} ({spec.weight_kind}; sum {sig(acc.weight_sum or 0.0)})")
    for col, n in sorted(acc.filled.items()):
        lines.append(f"filled {count(n)} missing values of {col} ({spec.policy_for(col).to_text()})")
    for col, c in (result.coding or {}).get("columns", {}).items():
        ref = f"reference {c['reference']!r}" if c["reference"] is not None else "no reference (no intercept)"
        merged = f", {len(c['merged'])} rare merged into (other)" if c["merged"] else ""
        for new, olds in (c.get("merged_by_name") or {}).items():
            merged += f", {new!r} = {' + '.join(olds)}"
        lines.append(f"levels of {col}: {len(c['counts'])} seen, {ref}{merged}")
    absorbed = (result.coding or {}).get("absorbed")
    if absorbed:
        within = absorbed.get("r_squared_within")
        lines.append(f"absorbed {absorbed['column']}: {count(int(absorbed['levels']))} levels as fixed effects "
                     f"(kept for prediction, not listed)"
                     + (f"; R² within levels {within:.6f}" if within is not None else ""))
    return [f"design    {lines[0]}"] + [f"          {ln}" for ln in lines[1:]] if lines else []


def _relative_lines(collin, target: str) -> list[str]:
    """Standardised estimates and VIFs, one compact line per feature (solve/collinearity.py)."""
    if not collin.terms:
        return []
    out = [f"          standardised design condition {sig(collin.condition, 3)}"
           + ("" if collin.centred else " (uncentred: no intercept)")]
    w = max(len(t) for t in collin.terms)
    head = f"sd of {target} per sd of the term" if collin.std_estimate is not None else ""
    out.append(f"relative  {'term'.ljust(w)}  {'std.est':>9}  {'VIF':>8}  {head}".rstrip())
    for i, t in enumerate(collin.terms):
        std = sig(collin.std_estimate[i], 4) if collin.std_estimate is not None else "—"
        out.append(f"          {t.ljust(w)}  {std:>9}  {sig(collin.vif[i], 4):>8}")
    return out


def render_text(result: FitResult) -> str:
    inf = result.inference
    spec = result.spec
    acc = result.accumulator
    head = f"tallfit ▸ {spec.target} on {len(result.terms)} terms"
    out = [head + result.solver.rjust(78 - len(head)), RULE]
    if result.source.get("description"):
        out.append(f"data      {result.source['description']}")
    ran = result.options.get("cluster")
    if ran and ran.get("parts"):
        out.append(f"          read on the dask cluster {ran['scheduler']}: {count(ran['parts'])} parts "
                   f"in {ran['passes']} pass{'es' if ran['passes'] != 1 else ''}")
    dropped = ""
    if acc.n_dropped:
        parts = ", ".join(f"{k.strip('()')} {count(v)}" for k, v in sorted(acc.dropped_by_column.items()))
        dropped = f" · {count(acc.n_dropped)} not used ({parts})"
    out.append(f"rows      {count(acc.n_read)} read · {count(acc.n_used)} used{dropped}")
    out.extend(_design_lines(result))
    out.append("")
    out.append(f"effects   change in {spec.target} per unit of each term, the others held fixed")
    out.extend(_effects(result))
    out.extend(_robust_lines(result))
    out.append("")
    r2_kind = "R²" if inf.centered else "R² (uncentred, no intercept)"
    out.append(
        f"fit       residual sd {sig(inf.residual_std, 6)} on {count(inf.df_resid)} df · "
        f"{r2_kind} {inf.r_squared:.6f} · adjusted {inf.adj_r_squared:.6f}"
    )
    if inf.df_model > 0:
        out.append(
            f"          all terms at once: F {sig(inf.f_statistic, 6)} on {inf.df_model} and "
            f"{count(inf.df_resid)} df, p {pval(inf.f_p_value)}"
        )
    out.append(
        f"          log-likelihood {sig(inf.log_likelihood, 9)} · AIC {sig(inf.aic, 9)} · BIC {sig(inf.bic, 9)}"
    )
    out.append(
        f"numerics  scaled condition number {sig(result.condition_number, 3)} · about "
        f"{result.trusted_digits:.0f} trusted digits in every estimate"
    )
    if result.refinement:
        changes = ", ".join(f"{c:.1e}" for c in result.refinement["max_relative_change"])
        out.append(f"          refined in {result.refinement['passes']} passes (largest relative corrections {changes})")
    collin = result.collinearity()
    out.extend(_relative_lines(collin, spec.target))
    ranges = result.feature_ranges()
    if ranges:
        out.append("")
        out.append("feature ranges fitted")
        w = max(len(f) for f in ranges)
        for f, (lo, hi) in ranges.items():
            out.append(f"  {f.ljust(w)}  {sig(lo)} … {sig(hi)}")
    if result.warnings or collin.warnings:
        out.append("")
        out.append("notes")
        out.extend(f"  ! {w}" for w in list(result.warnings) + collin.warnings)
    out.append("")
    out.append("read with care")
    out.extend(f"  · {c}" if not c.startswith("  ") else f"  {c}" for c in _cautions(result))
    return "\n".join(out) + "\n"
