"""The comparison: its exact loss gaps against brute-force recomputation on the data; table,
JSON and plots from the command line.

References: numpy.linalg.lstsq (LAPACK) for the optimum and the loss of every recorded iterate
recomputed on the in-memory data (‖Xb − y‖² − ‖Xβ̂ − y‖², and its orthogonal form ‖X(b − β̂)‖²),
on the Fair (1978) affairs data statsmodels ships; the holdout MSE recomputed the same way.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tallfit.cli import main
from tallfit.compare import compare
from tallfit.compare.report import render_text, to_dict

sm = pytest.importorskip("statsmodels.api")
FAIR_X = ["rate_marriage", "age", "yrs_married", "children", "religious", "educ"]


@pytest.fixture(scope="module")
def fair_split():
    df = sm.datasets.fair.load_pandas().data
    cols = {c: df[c].to_numpy(dtype=float) for c in FAIR_X + ["affairs"]}
    table = pa.table(cols)
    return table.slice(0, 5000), table.slice(5000)


def _xy(table):
    X = np.column_stack([np.ones(table.num_rows)] + [table.column(c).to_numpy() for c in FAIR_X])
    return X, table.column("affairs").to_numpy()


def test_exact_gap_equals_brute_force(fair_split):
    train, hold = fair_split
    cmp = compare(train, "affairs", FAIR_X, solvers=["gd", "cg", "sgd"], holdout=hold, batch_rows=1024,
                  solver_options={"gd": {"max_passes": 30}, "sgd": {"epochs": 3}})
    X, y = _xy(train)
    Xh, yh = _xy(hold)
    ref = np.linalg.lstsq(X, y, rcond=None)[0]  # reference: LAPACK least squares
    rss = float(np.sum((X @ ref - y) ** 2))
    checked = 0
    for run in cmp.runs:
        for step in run.run.history.steps:
            b = np.asarray(step.coef)
            direct = float(np.sum((X @ b - y) ** 2)) - rss
            d = X @ (b - ref)
            orth = float(d @ d)
            if step.relative_gap > 1e-8:  # above where the direct difference loses its digits
                np.testing.assert_allclose(step.loss_gap, direct, rtol=1e-6)
                checked += 1
            if step.relative_gap > 1e-20:
                np.testing.assert_allclose(step.loss_gap, orth, rtol=1e-4)
            np.testing.assert_allclose(step.holdout_mse, np.mean((Xh @ b - yh) ** 2), rtol=1e-9)
    assert checked > 20
    np.testing.assert_allclose(cmp.exact_holdout_mse, np.mean((Xh @ ref - yh) ** 2), rtol=1e-9)
    doc = to_dict(cmp)
    cg = next(s for s in doc["solvers"] if s["solver"] == "cg")
    assert cg["reached"]["1e-06"]["passes"] <= cg["passes"]
    text = render_text(cmp)
    assert "gap ≤ 1e-06" in text and "holdout MSE" in text and "reading" in text


def test_compare_command_writes_table_json_and_plots(fair_split, tmp_path, capsys):
    train, _ = fair_split
    data = tmp_path / "fair.parquet"
    pq.write_table(train, data)
    stem = tmp_path / "out" / "cmp"
    stem.parent.mkdir()
    rc = main(["compare", str(data), "--target", "affairs", "--features", ",".join(FAIR_X), "--solvers", "cg,gd",
               "--passes", "3", "--out", str(stem), "--cache", "--no-progress"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "not reached" in out  # 3 passes of gd cannot reach 1e-6 here
    doc = json.loads((tmp_path / "out" / "cmp.json").read_text())
    assert [s["solver"] for s in doc["solvers"]] == ["cg", "gd"]
    assert doc["cache"]["status"] == "removed"
    assert (tmp_path / "out" / "cmp.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert b"<svg" in (tmp_path / "out" / "cmp.svg").read_bytes()[:400]


def test_compare_reports_a_diverging_solver_and_goes_on(fair_split):
    train, _ = fair_split
    cmp = compare(train, "affairs", FAIR_X, solvers=["gd", "cg"], solver_options={"gd": {"step_scale": 4.0}})
    gd, cg = cmp.runs
    assert gd.run is None and "diverged" in gd.error
    assert cg.run is not None
    assert "diverged and gave no answer" in render_text(cmp)


def test_compare_bad_output_directory_fails_before_work(fair_split, tmp_path, capsys):
    train, _ = fair_split
    data = tmp_path / "fair.parquet"
    pq.write_table(train, data)
    rc = main(["compare", str(data), "--target", "affairs", "--features", "age", "--out",
               str(tmp_path / "missing" / "cmp")])
    assert rc == 2
    assert "does not exist" in capsys.readouterr().err
