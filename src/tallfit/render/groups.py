"""The human summary of per-group models: one line per group, then the groups not fitted."""

from __future__ import annotations

from tallfit.render.numbers import count, sig, table

MAX_TERMS_SHOWN = 6


def render_groups(grouped) -> str:
    groups = grouped.groups
    first = next(iter(groups.values()))
    spec = first.spec
    terms = first.terms[:MAX_TERMS_SHOWN]
    head = f"tallfit ▸ {spec.target} per {' × '.join(grouped.by)}: {len(groups)} models"
    out = [head, "─" * 78]
    if grouped.source.get("description"):
        out.append(f"data      {grouped.source['description']}")
    out.append(f"rows      {count(grouped.n_read)} read · {count(grouped.n_used)} used")
    out.append("")
    robust = all(r.robust for r in groups.values())
    kind = first.robust["selected"] if robust else ""
    errors = f"{kind} std.err, from a second pass" if robust else "std.err"
    out.append(f"estimate ({errors}) per group"
               + (f"; first {MAX_TERMS_SHOWN} terms" if len(first.terms) > MAX_TERMS_SHOWN else ""))
    header = ["group", "rows", "R²", "resid sd"] + terms
    rows = [header]
    for key, r in groups.items():
        inf = r.inference
        cells = [key, count(inf.n_used), f"{inf.r_squared:.4f}", sig(inf.residual_std, 4)]
        se = r.robust["estimators"][r.robust["selected"]]["std_error"] if robust else inf.std_error
        coef = dict(zip(r.terms, zip(inf.estimate, se)))
        for t in terms:
            cells.append(f"{sig(coef[t][0], 5)} ({sig(coef[t][1], 2)})" if t in coef else "—")
        rows.append(cells)
    out.extend(table(rows))
    notes = dict.fromkeys(n for r in groups.values() for n in ((r.robust or {}).get("notes") or []))
    notes.update(dict.fromkeys(w for r in groups.values() for w in r.warnings if w.startswith("no robust errors")))
    out.extend(f"  ! {n}" for n in notes)
    if grouped.failed:
        out.append("")
        out.append(f"not fitted ({len(grouped.failed)} groups)")
        for key, why in grouped.failed.items():
            out.append(f"  {key} ({count(grouped.rows.get(key, 0))} rows): {why}")
    out.append("")
    out.append("read with care")
    out.append("  · each group's estimates describe that group's rows only; comparing groups by eye over")
    out.append("    many groups finds differences by chance alone (multiple comparisons)")
    if robust:
        out.append("  · association, not causation; the robust errors allow unequal noise (and, when clustered,")
        out.append("    dependence within a cluster), not dependence the clusters do not capture")
    else:
        out.append("  · association, not causation; plain errors assume independent rows of equal noise")
    return "\n".join(out) + "\n"
