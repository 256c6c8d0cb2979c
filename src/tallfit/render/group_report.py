"""The HTML report of every group of a per-group model: an overview table of the groups' checks
(their Breusch–Pagan p-values adjusted across groups, Holm 1979), then each group's own report
sections (render/report.py), one self-contained file with its images beside it."""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from tallfit.atomic import write_text_atomic
from tallfit.diagnostics.multiple_tests import holm
from tallfit.render.numbers import count, pval, sig
from tallfit.render.report import _cautions, _e, _figures, _table, image_files, page, report_body, write_figures


def _anchor(i: int) -> str:
    return f"group-{i}"


def _curved(diag: dict[str, Any]) -> list[str]:
    """The features whose binned residuals bend away from the line."""
    return [f["name"] for f in diag["features"] if f["curvature"].get("curved")]


def _noise_p(checked: dict[str, dict[str, Any]]) -> np.ndarray:
    """Each group's Breusch–Pagan p-value, Holm-adjusted across the groups (NaN: not tested)."""
    return holm([(f["diagnostics"]["breusch_pagan"] or {}).get("p_value", np.nan) for f in checked.values()])


def group_findings(checked: dict[str, dict[str, Any]], alpha: float = 0.05) -> list[str]:
    """One short line per group: the features whose line bends and whether the noise is unequal
    (its Holm-adjusted Breusch–Pagan p-value below ``alpha``)."""
    lines = []
    for (key, found), p in zip(checked.items(), _noise_p(checked)):
        curved = _curved(found["diagnostics"])
        said = ([f"bends in {', '.join(curved)}"] if curved else []) + (["unequal noise"] if p < alpha else [])
        lines.append(f"{key}: {'; '.join(said) if said else 'no bend or unequal noise found'}")
    return lines


def _overview(checked: dict[str, dict[str, Any]]) -> str:
    keys = list(checked)
    adjusted = _noise_p(checked)
    rows = []
    for i, (key, adj) in enumerate(zip(keys, adjusted)):
        model, diag = checked[key]["model"], checked[key]["diagnostics"]
        inf = model.inference
        curved = _curved(diag)
        ratio = "—"
        if model.robust:
            est = model.robust["estimators"][model.robust["selected"]]["std_error"]
            with np.errstate(divide="ignore", invalid="ignore"):
                r = np.asarray(est) / np.asarray(inf.std_error)
            ratio = sig(float(np.nanmax(r)), 3) if np.isfinite(r).any() else "—"
        rows.append([
            f'<a href="#{_anchor(i)}">{_e(key)}</a>', count(inf.n_used), f"{inf.r_squared:.4f}",
            sig(inf.residual_std, 4), ratio, pval(adj) if np.isfinite(adj) else "—",
            (f'<span class="flag">{_e(", ".join(curved))}</span>' if curved else "none"),
        ])
    head = ["group", "rows", "R²", "resid sd", "largest robust ÷ plain std.err", "unequal noise p (Holm)",
            "bends flagged"]
    note = ("<p><small>Unequal noise: Breusch–Pagan on each group's rows, p-values adjusted across the "
            f"{len(keys)} groups by Holm's method (Holm 1979), so a small value is not a chance finding among "
            "many groups. Bends: each group's features tested against a line (its own report says how).</small></p>")
    return _table(head, rows) + note


def render_groups_html(grouped, checked: dict[str, dict[str, Any]], imgs: dict[str, dict[str, str]],
                       data_description: str = "", unchecked: dict[str, str] | None = None) -> str:
    first = next(iter(checked.values()))["model"]
    parts = [f"<h1>{_e(first.spec.target)} per {_e(' × '.join(grouped.by))}: {len(checked)} models checked</h1>",
             f"<p class='sub'>tallfit report · one pass over {_e(data_description)}</p>",
             "<h2>Groups at a glance</h2>", _overview(checked)]
    if grouped.failed:
        parts.append("<p>Not fitted: " + ", ".join(f"{_e(k)} ({_e(why)})" for k, why in grouped.failed.items()) + "</p>")
    if unchecked:
        parts.append("<p>Not checked: " + ", ".join(f"{_e(k)} ({_e(why)})" for k, why in unchecked.items()) + "</p>")
    for i, (key, found) in enumerate(checked.items()):
        parts.append(f'<section id="{_anchor(i)}"><h1>Group {_e(key)}</h1>')
        parts += report_body(found["model"], found["diagnostics"], imgs[key], data_description, cautions=False)
        parts.append("</section>")
    parts += ["<h2>Read with care</h2>", _cautions(first),
              "<p>Each group's estimates describe that group's rows only; comparing many groups by eye finds "
              "differences by chance alone (multiple comparisons).</p>"]
    return page(f"tallfit report: {first.spec.target} per {' × '.join(grouped.by)}", parts)


def write_group_report(grouped, checked: dict[str, dict[str, Any]], out: str | os.PathLike, *, images: bool = True,
                       data_description: str = "", unchecked: dict[str, str] | None = None) -> dict[str, Any]:
    """Write the HTML file of every checked group (and its images as PNG + SVG files in
    ``<stem>_files/``, each group's named ``group-<i>_…``, unless ``images=False``)."""
    target, written = image_files(out, images)
    imgs = {key: write_figures(_figures(f["model"], f["diagnostics"]), written, prefix=f"{_anchor(i)}_")
            for i, (key, f) in enumerate(checked.items())}
    write_text_atomic(target, render_groups_html(grouped, checked, imgs, data_description, unchecked))
    return written
