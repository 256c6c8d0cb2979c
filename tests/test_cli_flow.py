"""The command line end to end: demo, fit, show (summary and the JSON contract), predict."""

from __future__ import annotations

import json

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import synthetic_gen
from tallfit.cli import main

CONTRACT = [
    "terms", "n_used", "df_model", "df_resid", "residual_std", "r_squared", "adj_r_squared",
    "f_statistic", "f_p_value", "log_likelihood", "aic", "bic", "dropped_rows",
]
TERM_FIELDS = ["estimate", "std_error", "t", "p_value", "ci_low", "ci_high"]


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet")
    synthetic_gen.generate(root / "train", 30_000, seed=1, files=3, missing=0.01)
    synthetic_gen.generate(root / "new", 2_000, seed=2, fmt="csv")
    return root


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_demo_runs_end_to_end(tmp_path, capsys):
    code, out, err = _run(capsys, "demo", "--dir", tmp_path / "d", "--rows", 20_000, "--no-progress")
    assert code == 0, err
    assert (tmp_path / "d" / "model.json").exists()
    assert pq.read_table(tmp_path / "d" / "predictions.parquet").num_rows == 1000
    assert "intervals hold the true value" in out


def test_fit_show_predict(fleet, tmp_path, capsys):
    feats = ",".join(synthetic_gen.FEATURES)
    model = tmp_path / "model.json"
    code, out, err = _run(capsys, "fit", fleet / "train", "--target", "power_w", "--features", feats,
                          "--out", model, "--no-progress", "--batch-rows", 7000)
    assert code == 0, err
    assert "dropped" in out

    code, out, err = _run(capsys, "show", model, "--json")
    assert code == 0, err
    doc = json.loads(out)
    for key in CONTRACT:
        assert key in doc, key
    assert [t["name"] for t in doc["terms"]] == ["(intercept)", *synthetic_gen.FEATURES]
    for t in doc["terms"]:
        for key in TERM_FIELDS:
            assert isinstance(t[key], (int, float)), (t["name"], key)
    assert doc["n_used"] + doc["dropped_rows"]["total"] == 30_000
    assert doc["dropped_rows"]["total"] > 0
    assert set(doc["dropped_rows"]["by_column"]) <= set(synthetic_gen.FEATURES)

    code, out, err = _run(capsys, "show", model)
    assert code == 0 and "power_w" in out

    pred = tmp_path / "pred.csv"
    code, out, err = _run(capsys, "predict", model, fleet / "new", "--out", pred, "--intervals",
                          "--keep", "host_id,ts", "--no-progress")
    assert code == 0, err
    table = pacsv.read_csv(pred)
    assert table.column_names == ["host_id", "ts", "prediction", "ci_low", "ci_high", "pi_low", "pi_high"]
    assert table.num_rows == 2000
    p = table["prediction"].to_numpy(zero_copy_only=False)
    ok = ~np.isnan(p)
    assert np.all(table["pi_low"].to_numpy(zero_copy_only=False)[ok] < p[ok])
    assert np.all(table["ci_high"].to_numpy(zero_copy_only=False)[ok] < table["pi_high"].to_numpy(zero_copy_only=False)[ok])


def test_help_and_version(capsys):
    with pytest.raises(SystemExit) as e:
        main(["--help"])
    assert e.value.code == 0
    assert "fit" in capsys.readouterr().out
    assert main(["--version"]) == 0


def test_categorical_model_with_robust_errors_report_and_scoring(fleet, tmp_path, capsys):
    """fit --categorical with --robust and --cluster (the robust sums of a model with indicator
    columns once stopped with an internal error), then report and predict with intervals to
    Parquet with a pass-through id."""
    feats = ",".join(synthetic_gen.FEATURES)
    model = tmp_path / "cat.json"
    code, out, err = _run(capsys, "fit", fleet / "train", "--target", "power_w", "--features", feats,
                          "--categorical", "machine_class,region", "--robust", "HC3", "--cluster", "rack",
                          "--out", model, "--no-progress")
    assert code == 0, err
    code, out, err = _run(capsys, "show", model, "--json")
    doc = json.loads(out)
    names = [t["name"] for t in doc["terms"]]
    assert any(n.startswith("machine_class[") for n in names) and any(n.startswith("region[") for n in names)
    robust = doc["robust"]
    assert robust["selected"] == "cluster:rack" and {"HC3", "cluster:rack"} <= set(robust["estimators"])
    assert len(robust["estimators"]["HC3"]["std_error"]) == len(names)
    code, out, err = _run(capsys, "report", model, fleet / "train", "--out", tmp_path / "r.html", "--no-progress",
                          "--no-images")
    assert code == 0, err
    assert (tmp_path / "r.html").stat().st_size > 0
    pred = tmp_path / "pred.parquet"
    code, out, err = _run(capsys, "predict", model, fleet / "new", "--out", pred, "--intervals",
                          "--keep", "host_id", "--no-progress")
    assert code == 0, err
    table = pq.read_table(pred)
    assert table.column_names == ["host_id", "prediction", "ci_low", "ci_high", "pi_low", "pi_high"]
    assert table.num_rows == 2000 and table["prediction"].null_count < 100
