"""The HTML report renders: it parses, every embedded image decodes (PIL), nothing is fetched from
the network, the image files are written, and bad input stops the command before any output.
A headless Chromium check runs only where /usr/bin/chromium exists.
"""

from __future__ import annotations

import base64
import io
import os
import subprocess
from html.parser import HTMLParser

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tallfit.cli import main

PIL = pytest.importorskip("PIL.Image")


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[dict] = []
        self.links: list[str] = []
        self.headings: list[str] = []
        self._in_h2 = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a)
        for key in ("src", "href"):
            if key in a and tag != "img":
                self.links.append(a[key])
        self._in_h2 = tag == "h2"

    def handle_data(self, data):
        if self._in_h2:
            self.headings.append(data.strip())
            self._in_h2 = False


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """Invented server telemetry: power draw against load and a quadratic inlet temperature."""
    rng = np.random.default_rng(8)
    n = 6000
    host = rng.integers(0, 60, n)
    load = rng.uniform(0, 1, n)
    temp = rng.normal(24, 3, n)
    power = 120 + 180 * load + 0.3 * (temp - 24) ** 2 + rng.normal(0, 2 + 6 * load, n) + rng.normal(0, 3, 60)[host]
    folder = tmp_path_factory.mktemp("fleet")
    path = folder / "fleet.parquet"
    pq.write_table(pa.table({"host_id": [f"h{h:03d}" for h in host], "cpu_util": load,
                             "inlet_temp_c": temp, "power_w": power}), path)
    model = folder / "model.json"
    assert main(["fit", str(path), "--target", "power_w", "--features", "cpu_util,inlet_temp_c",
                 "--out", str(model), "--no-progress"]) == 0
    return folder, path, model


def test_report_renders_and_every_image_decodes(fleet, capsys):
    folder, data, model = fleet
    out = folder / "report.html"
    rc = main(["report", str(model), str(data), "--out", str(out), "--cluster", "host_id",
               "--keep", "host_id", "--no-progress"])
    assert rc == 0
    printed = capsys.readouterr().out
    assert "inlet_temp_c: the straight line misses a bend" in printed
    text = out.read_text(encoding="utf-8")
    parser = _Collect()
    parser.feed(text)
    assert len(parser.imgs) == 6  # coefficients, robust vs plain, 2 binned, heat map, distribution
    for img in parser.imgs:
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        with PIL.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            im.verify()
            assert im.size[0] > 200 and im.size[1] > 100
        assert img.get("alt")
    assert not [u for u in parser.links if u.startswith(("http:", "https:", "//"))]
    for heading in ("Data", "Accuracy", "Estimates", "Is the straight line right?", "Read with care"):
        assert heading in parser.headings
    for caution in ("Association is not causation", "Extrapolation", "Dependent rows", "Multiple testing"):
        assert caution in text
    assert "cluster:host_id" in text and "h0" in text  # clustered errors and pass-through ids shown
    files = sorted(p.name for p in (folder / "report_files").iterdir())
    assert "coefficients.png" in files and "coefficients.svg" in files and len(files) == 12
    with PIL.open(folder / "report_files" / "fitted_vs_residual.png") as im:
        im.verify()
    assert (folder / "report_files" / "residual_distribution.svg").read_text().lstrip().startswith("<?xml")


@pytest.mark.skipif(not os.path.exists("/usr/bin/chromium"), reason="headless Chromium is not installed")
def test_report_loads_in_headless_chromium(fleet, tmp_path):
    """Every image decodes in a real browser: a probe script appended to a copy of the page marks
    the DOM with the images that loaded (complete, naturalWidth > 0) once the page has settled."""
    folder, data, model = fleet
    out = tmp_path / "r.html"
    assert main(["report", str(model), str(data), "--out", str(out), "--no-progress", "--no-images"]) == 0
    probe = tmp_path / "probe.html"
    probe.write_text(out.read_text(encoding="utf-8") + (
        "<script>window.addEventListener('load', () => { const im = [...document.images];"
        " document.body.setAttribute('data-probe', im.filter(i => i.complete && i.naturalWidth > 0).length"
        " + '/' + im.length); });</script>"), encoding="utf-8")
    dom = subprocess.run(["/usr/bin/chromium", "--headless", "--disable-gpu", "--no-sandbox",
                          "--disable-background-networking", "--disable-component-update", "--disable-sync",
                          "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
                          "--virtual-time-budget=5000", "--dump-dom", probe.as_uri()],
                         capture_output=True, text=True, timeout=120).stdout
    assert 'data-probe="6/6"' in dom, dom[-500:]
    assert "Read with care" in dom


def test_report_bad_input_writes_nothing(fleet, tmp_path, capsys):
    folder, data, model = fleet
    out = tmp_path / "r.html"
    assert main(["report", str(model), str(data), "--out", str(out), "--cluster", "rack_id", "--no-progress"]) == 2
    assert "column 'rack_id' not found" in capsys.readouterr().err
    assert main(["report", str(model), str(data), "--out", str(out), "--bins", "2", "--no-progress"]) == 2
    assert "--bins 2" in capsys.readouterr().err
    assert main(["report", str(tmp_path / "missing.json"), str(data), "--out", str(out)]) == 2
    assert not out.exists() and not (tmp_path / "r_files").exists()
    assert [p.name for p in tmp_path.iterdir()] == []


def test_fit_cli_robust_option(fleet, capsys):
    folder, data, _ = fleet
    assert main(["fit", str(data), "--target", "power_w", "--features", "cpu_util,inlet_temp_c",
                 "--robust", "hc3", "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "HC3 errors beside the plain ones" in out


def test_report_of_an_absorbed_model_from_its_file(fleet, capsys):
    """fit --absorb host_id, saved and loaded back (level means packed in the file), then report:
    host-clustered errors, the binned checks (which still find the bend in inlet_temp_c) and
    every image decoding; the plain summary calls its R² centred (the levels span the constant)."""
    folder, data, _ = fleet
    model = folder / "absorbed.json"
    assert main(["fit", str(data), "--target", "power_w", "--features", "cpu_util,inlet_temp_c",
                 "--absorb", "host_id", "--robust", "HC3", "--out", str(model), "--no-progress"]) == 0
    printed = capsys.readouterr().out
    assert "HC3" in printed and "uncentred" not in printed
    assert "absorbed host_id: 60 levels as fixed effects" in printed and "R² within levels" in printed
    out = folder / "absorbed.html"
    assert main(["report", str(model), str(data), "--out", str(out), "--cluster", "host_id",
                 "--no-progress"]) == 0
    assert "inlet_temp_c: the straight line misses a bend" in capsys.readouterr().out
    parser = _Collect()
    parser.feed(out.read_text(encoding="utf-8"))
    assert len(parser.imgs) == 6
    for img in parser.imgs:
        with PIL.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1]))) as im:
            im.verify()
    html = out.read_text(encoding="utf-8")
    assert "cluster:host_id" in html and "host_id is absorbed: 60 levels" in html and "R² within levels" in html


def test_report_of_one_group_of_a_per_group_model(fleet, tmp_path, capsys):
    """fit --by (hosts split in two halves by an invented column), then report --group: the report
    checks that group's rows only, says which rows it kept, and still finds the bend in
    inlet_temp_c; with a group the file lacks, exit 2 and nothing written. (Without --group every
    group is checked: test_report_of_every_group_in_one_pass.)"""
    folder, data, _ = fleet
    t = pq.read_table(data)
    half = np.where(np.arange(t.num_rows) % 2 == 0, "even", "odd")
    path = tmp_path / "halves.parquet"
    pq.write_table(t.append_column("half", pa.array(half)), path)
    model = tmp_path / "g.json"
    assert main(["fit", str(path), "--target", "power_w", "--features", "cpu_util,inlet_temp_c", "--by", "half",
                 "--out", str(model), "--no-progress"]) == 0
    out = tmp_path / "odd.html"
    assert main(["report", str(model), str(path), "--out", str(out), "--group", "none", "--no-progress"]) == 2
    assert "no model for group 'none'" in capsys.readouterr().err and not out.exists()
    assert main(["report", str(model), str(path), "--out", str(out), "--group", "odd", "--no-progress"]) == 0
    assert "inlet_temp_c: the straight line misses a bend" in capsys.readouterr().out
    html = out.read_text(encoding="utf-8")
    assert "Rows kept: <code>&quot;half&quot; = &#x27;odd&#x27;</code>" in html
    assert "3,000 rows used" in html


def test_report_of_every_group_in_one_pass(fleet, tmp_path, capsys):
    """fit --by, then report without --group: one pass checks every group. Each group's numbers
    equal those of checking that group alone (diagnose(group=...), itself checked against
    statsmodels in test_grouped.py); the page opens with an overview whose Breusch–Pagan p-values
    are Holm-adjusted across the groups, parses, and every embedded image decodes."""
    from tallfit.api import diagnose
    from tallfit.diagnostics.multiple_tests import holm
    from tallfit.modelfile import load_model

    folder, data, _ = fleet
    t = pq.read_table(data)
    third = np.array(["a", "b", "c"])[np.arange(t.num_rows) % 3]
    path = tmp_path / "thirds.parquet"
    pq.write_table(t.append_column("third", pa.array(third)), path, row_group_size=1000)
    model = tmp_path / "g.json"
    assert main(["fit", str(path), "--target", "power_w", "--features", "cpu_util,inlet_temp_c", "--by", "third",
                 "--out", str(model), "--no-progress"]) == 0
    out = tmp_path / "all.html"
    assert main(["report", str(model), str(path), "--out", str(out), "--keep", "host_id", "--cluster", "host_id",
                 "--batch-rows", "700", "--no-progress"]) == 0
    printed = capsys.readouterr().out
    for key in "abc":
        assert f"{key}: bends in inlet_temp_c" in printed
    text = out.read_text(encoding="utf-8")
    parser = _Collect()
    parser.feed(text)
    assert len(parser.imgs) == 3 * 6  # each group's six figures
    for img in parser.imgs:
        with PIL.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1]))) as im:
            im.verify()
    assert not [u for u in parser.links if u.startswith(("http:", "https:", "//"))]
    assert "Groups at a glance" in parser.headings and parser.headings.count("Estimates") == 3
    assert len(list((tmp_path / "all_files").iterdir())) == 3 * 12
    whole = diagnose(load_model(model), path, keep=["host_id"], cluster="host_id", batch_rows=700)
    bp = []
    for key, found in whole["groups"].items():
        alone = diagnose(load_model(model), path, group=key, keep=["host_id"], cluster="host_id", batch_rows=700)
        a, b = found["diagnostics"], alone["diagnostics"]
        assert a["n_used"] == b["n_used"] == found["model"].inference.n_used == 2000
        np.testing.assert_allclose(found["model"].robust["estimators"]["cluster:host_id"]["std_error"],
                                   alone["model"].robust["estimators"]["cluster:host_id"]["std_error"], rtol=1e-12)
        assert a["breusch_pagan"]["statistic"] == pytest.approx(b["breusch_pagan"]["statistic"], rel=1e-12)
        assert a["top_residuals"] == b["top_residuals"]  # named by their rows in the file, with host_id
        assert [f["bins"] for f in a["features"]] == [f["bins"] for f in b["features"]]
        bp.append(b["breusch_pagan"]["p_value"])
    from tallfit.render.numbers import pval

    overview = text.split("Groups at a glance", 1)[1].split("<section", 1)[0]
    for adjusted in holm(bp):
        assert f"<td>{pval(adjusted)}</td>" in overview
