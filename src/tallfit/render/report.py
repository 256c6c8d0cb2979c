"""The HTML report: one self-contained file (images embedded as base64, no network) and the images
as PNG and SVG files beside it. Our own layout: a verdict first, then the numbers, then the
checks, then how to read them.
"""

from __future__ import annotations

import base64
import html
import os
from pathlib import Path
from typing import Any

from tallfit.atomic import atomic_path, check_writable, write_text_atomic
from tallfit.render.numbers import count, pval, sig
from tallfit.results import FitResult

CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:#263238;margin:0;background:#f5f7f8}
main{max-width:980px;margin:0 auto;padding:28px 24px 60px;background:#fff}
h1{font-size:22px;margin:0 0 4px} h2{font-size:16px;margin:34px 0 8px;padding-bottom:4px;border-bottom:2px solid #00897b}
h3{font-size:14px;margin:18px 0 4px}
.sub{color:#607d8b;margin:0 0 18px}
.verdict{background:#fff8e1;border-left:4px solid #ef8f00;padding:10px 14px;margin:14px 0}
.verdict li{margin:4px 0}
.ok{background:#e0f2f1;border-left-color:#00897b}
table{border-collapse:collapse;margin:6px 0 10px;font-variant-numeric:tabular-nums}
th,td{padding:3px 9px;text-align:right;border-bottom:1px solid #eceff1}
th{font-weight:600;color:#455a64;background:#fafafa} td:first-child,th:first-child{text-align:left}
.flag{color:#c65100;font-weight:600}
.grid{display:grid;grid-template-columns:repeat(auto-fill,minmax(170px,1fr));gap:8px;margin:8px 0}
.tile{background:#eceff1;border-radius:6px;padding:8px 10px}.tile b{display:block;font-size:17px}
img{max-width:100%;height:auto;display:block;margin:6px 0}
.caution li{margin:6px 0} small{color:#607d8b}
"""


def _e(x: Any) -> str:
    return html.escape(str(x))


def _table(head: list[str], rows: list[list[Any]], cls: str = "") -> str:
    th = "".join(f"<th>{_e(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    return f'<table class="{cls}"><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>'


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'


def _figures(model: FitResult, diag: dict[str, Any]) -> dict[str, tuple[str, Any]]:
    from tallfit.render import plots

    inf = model.inference
    r = model.robust
    figs: dict[str, tuple[str, Any]] = {}
    rl = rh = None
    if r:
        est = r["estimators"][r["selected"]]
        rl, rh = est["ci_low"], est["ci_high"]
    figs["coefficients"] = ("estimates with plain and robust intervals",
                            plots.coefficients(model.terms, inf.estimate, inf.ci_low, inf.ci_high, rl, rh,
                                               r["selected"] if r else ""))
    if r:
        figs["robust_vs_plain"] = ("robust over plain standard errors",
                                   plots.robust_ratios(model.terms, inf.std_error, r["estimators"], r["selected"]))
    for f in diag["features"]:
        figs[f"binned_{f['name']}"] = (f"binned residuals against {f['name']}", plots.binned_residuals(f))
    figs["fitted_vs_residual"] = ("residuals against fitted values", plots.fitted_heat(diag["heat"], diag["fitted"]["bins"]))
    figs["residual_distribution"] = ("residual distribution", plots.residual_distribution(diag["residuals"]))
    return figs


def _coef_section(model: FitResult) -> str:
    inf, r = model.inference, model.robust
    level = f"{inf.conf_level:.0%}"
    head = ["term", "estimate", "std.err", f"{level} interval", "p"]
    if r:
        sel = r["selected"]
        est = r["estimators"][sel]
        head += [f"{sel} std.err", f"{sel} interval", f"{sel} p"]
    head.append("digits")
    rows = []
    for i, t in enumerate(model.terms):
        row = [_e(t), sig(inf.estimate[i], 7), sig(inf.std_error[i], 3),
               f"{sig(inf.ci_low[i], 5)} … {sig(inf.ci_high[i], 5)}", pval(inf.p_value[i])]
        if r:
            row += [sig(est["std_error"][i], 3), f"{sig(est['ci_low'][i], 5)} … {sig(est['ci_high'][i], 5)}",
                    pval(est["p_value"][i])]
        row.append(f"{model.digits[i]:.0f}")
        rows.append(row)
    out = _table(head, rows)
    if r:
        out += f"<p><small>{_e(r['selected'])}: t on {count(est['df'])} df. "
        out += "HC0–HC3: White (1980); MacKinnon &amp; White (1985). Clustered: CRV1 with G/(G−1)·(n−1)/(n−p); "
        out += "two-way by inclusion–exclusion (Cameron, Gelbach &amp; Miller 2011).</small></p>"
        out += "".join(f'<p class="flag">! {_e(n)}</p>' for n in r.get("notes", []))
    return out


def _data_section(model: FitResult, diag: dict[str, Any], data_description: str) -> str:
    acc = model.accumulator
    rows = [["fitting data", _e(model.source.get("description", "")), count(acc.n_read), count(acc.n_used),
             count(acc.n_dropped)],
            ["checked here", _e(data_description), count(diag["n_read"]), count(diag["n_used"]),
             count(diag["n_read"] - diag["n_used"])]]
    out = _table(["", "data", "rows read", "used", "not used"], rows)
    if model.spec.where:  # a --where filter, or the group a per-group model's check reads
        out += f"<p>Rows kept: <code>{_e(model.spec.where)}</code></p>"
    reasons = sorted(acc.dropped_by_column.items())
    if reasons:
        out += "<p>Rows not used, by reason (a row missing in two columns counts in both): " + ", ".join(
            f"{_e(k)} {count(v)}" for k, v in reasons) + "</p>"
    files = model.source.get("files") or []
    if files:
        shown = files[:12]
        out += _table(["file", "bytes"], [[_e(f["path"]), count(int(f["size"]))] for f in shown])
        if len(files) > 12:
            out += f"<p><small>… and {len(files) - 12} more files</small></p>"
    absorbed = (model.coding or {}).get("absorbed")
    if absorbed:
        out += (f"<p>{_e(absorbed['column'])} is absorbed: {count(int(absorbed['levels']))} levels as fixed "
                "effects, each row checked against its own level's effect.</p>")
    if not diag["same_data"]:
        out += '<p class="flag">The checked rows are not the rows the model was fitted on.</p>'
    return out


def _accuracy_section(model: FitResult, diag: dict[str, Any]) -> str:
    inf, res = model.inference, diag["residuals"]
    tiles = [
        ("residual sd", sig(inf.residual_std, 5)), ("R²" if inf.centered else "R² (uncentred)", f"{inf.r_squared:.5f}"),
        ("adjusted R²", f"{inf.adj_r_squared:.5f}"),
        *([("R² within levels", f"{within:.5f}")] if (within := ((model.coding or {}).get("absorbed") or {})
                                                       .get("r_squared_within")) is not None else []),
        ("mean absolute error", sig(res["mae"], 5)),
        ("root mean square error", sig(res["rmse"], 5)), ("trusted digits", f"{model.trusted_digits:.0f}"),
    ]
    out = '<div class="grid">' + "".join(f'<div class="tile">{_e(a)}<b>{b}</b></div>' for a, b in tiles) + "</div>"
    q = res["quantiles"]
    out += _table(["residual quantile"] + list(q), [["value"] + [sig(v, 4) for v in q.values()]])
    out += (f"<p><small>Quantiles from a histogram sketch, within ±{sig(res['quantile_error_bound'], 2)}. "
            "These are in-sample errors: a new row's error is larger, by about the width of the "
            "prediction interval.</small></p>")
    return out


def _linearity_section(diag: dict[str, Any], imgs: dict[str, str]) -> str:
    rows = []
    for f in diag["features"]:
        c = f["curvature"]
        verdict = f'<span class="flag">curved, {_e(c["direction"])}</span>' if c["curved"] else (_e(c["reason"]) or "straight enough")
        rows.append([_e(f["name"]), c["bins"], sig(c["statistic"], 4), c["df"], pval(c["p_value"]),
                     f"{c['bend']:.1%}" if c["bend"] == c["bend"] else "—", verdict])
    out = ("<p>Mean residual per bin of each feature: if the straight line is right they scatter "
           "around zero. The test compares the bins' means with a line (χ², Bonferroni over the "
           "features); a flag also needs a bin mean at least 10 % of the residual sd away from the line.</p>")
    out += _table(["feature", "bins", "χ²", "df", "p", "bend", "verdict"], rows)
    out += "".join(imgs.get(f"binned_{f['name']}", "") for f in diag["features"])
    return out


def _noise_section(diag: dict[str, Any], imgs: dict[str, str]) -> str:
    bp = diag["breusch_pagan"]
    out = ""
    if bp:
        out += (f"<p>Breusch–Pagan ({_e(bp['form'])}): {sig(bp['statistic'], 6)} on {bp['df']} df, "
                f"p {pval(bp['p_value'])}. A small p-value says the noise grows or shrinks with the terms, "
                "so the plain standard errors are unreliable.</p>")
    ratio = diag["fitted"]["spread_ratio"]
    if ratio == ratio:
        out += f"<p>Residual spread across bins of fitted values varies {ratio:.2f}×.</p>"
    return out + imgs.get("fitted_vs_residual", "")


def _rows_table(rows: list[dict[str, Any]]) -> str:
    if not rows:
        return "<p>—</p>"
    keys = [k for k in rows[0] if k not in ("file",)] + (["file"] if any(r.get("file") for r in rows) else [])
    fmt = lambda v: sig(v, 6) if isinstance(v, float) else _e(v)  # noqa: E731
    return _table(keys, [[fmt(r.get(k, "")) for k in keys] for r in rows])


def _cautions(model: FitResult) -> str:
    k = len(model.terms) - (1 if model.spec.intercept else 0)
    items = [
        "<b>Association is not causation.</b> An estimate is how the target moves with a term in these "
        "data, the other terms held fixed; it is not what changing that term would do.",
        "<b>Extrapolation.</b> The line is supported only within the fitted ranges of the features; "
        "predictions outside them extrapolate.",
        "<b>Dependent rows.</b> Rows from the same host or minute are not independent and noise often "
        "grows with load: the plain errors are then too small. Robust errors fix unequal noise; "
        "clustered errors (by host, day) fix dependence within clusters.",
        f"<b>Multiple testing.</b> With {k} terms tested at 5 %, about {0.05 * k:.1f} look significant by "
        "chance alone; adjust (Holm, Benjamini–Hochberg) before screening.",
    ]
    return '<ul class="caution">' + "".join(f"<li>{i}</li>" for i in items) + "</ul>"


def report_body(model: FitResult, diag: dict[str, Any], imgs: dict[str, str], data_description: str = "",
                cautions: bool = True) -> list[str]:
    """The report's sections for one model (HTML fragments, in order)."""
    advice = diag["advice"]
    calm = len(advice) == 1 and advice[0].startswith("no curvature")
    verdict = f'<div class="verdict{" ok" if calm else ""}"><ul>' + "".join(f"<li>{_e(a)}</li>" for a in advice) + "</ul></div>"
    parts = [
        "<h2>What the checks found</h2>", verdict,
        "<h2>Data</h2>", _data_section(model, diag, data_description),
        "<h2>Accuracy</h2>", _accuracy_section(model, diag),
        "<h2>Estimates</h2>", _coef_section(model), imgs.get("coefficients", ""), imgs.get("robust_vs_plain", ""),
        "<h2>Is the straight line right?</h2>", _linearity_section(diag, imgs),
        "<h2>Is the noise constant?</h2>", _noise_section(diag, imgs),
        "<h2>Residual distribution</h2>", imgs.get("residual_distribution", ""),
        "<h3>Largest residuals</h3>", _rows_table(diag["top_residuals"]),
        "<h3>Largest leverages</h3>", _rows_table(diag["top_leverage"]),
    ]
    if cautions:
        parts += ["<h2>Read with care</h2>", _cautions(model)]
    return parts


def page(title: str, parts: list[str]) -> str:
    """A whole self-contained HTML page around the fragments ``parts``."""
    return "\n".join([
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{_e(title)}</title><style>{CSS}</style></head><body><main>", *parts, "</main></body></html>",
    ])


def render_html(model: FitResult, diag: dict[str, Any], imgs: dict[str, str], data_description: str = "") -> str:
    head = [f"<h1>{_e(model.spec.target)} explained by {len(model.terms)} terms</h1>",
            f"<p class='sub'>tallfit report · {_e(model.solver)} · {count(model.inference.n_used)} rows used</p>"]
    return page(f"tallfit report: {model.spec.target}", head + report_body(model, diag, imgs, data_description))


def image_files(out: str | os.PathLike, images: bool) -> tuple[Path, dict[str, Any]]:
    """The checked HTML path and what ``write_figures`` will write beside it."""
    target = check_writable(out)
    written: dict[str, Any] = {"html": str(target), "images": []}
    folder = target.parent / f"{target.stem}_files"
    if images:
        folder.mkdir(exist_ok=True)
        written["images_dir"] = str(folder)
    return target, written


def write_figures(figs: dict[str, tuple[str, Any]], written: dict[str, Any], prefix: str = "") -> dict[str, str]:
    """Each figure as an embedded <img> (returned by key) and, when ``written`` has an images
    folder, as PNG and SVG files in it (named ``prefix`` + key)."""
    imgs: dict[str, str] = {}
    folder = Path(written["images_dir"]) if written.get("images_dir") else None
    for key, (alt, fig) in figs.items():
        png, svg = _encode(fig)
        imgs[key] = _img(png, alt)
        if folder is not None:
            safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in prefix + key)
            for ext, data in (("png", png), ("svg", svg)):
                with atomic_path(folder / f"{safe}.{ext}") as tmp:
                    Path(tmp).write_bytes(data)
                written["images"].append(str(folder / f"{safe}.{ext}"))
    return imgs


def write_report(model: FitResult, diag: dict[str, Any], out: str | os.PathLike, *, images: bool = True,
                 data_description: str = "") -> dict[str, Any]:
    """Write the HTML file (and PNG + SVG files in ``<stem>_files/`` unless ``images=False``)."""
    target, written = image_files(out, images)
    imgs = write_figures(_figures(model, diag), written)
    write_text_atomic(target, render_html(model, diag, imgs, data_description))
    return written


def _encode(fig) -> tuple[bytes, bytes]:
    from tallfit.render.plots import encode

    return encode(fig)
