"""tallfit validate end to end on the demo fleet: report, JSON, plot, model file, bad input."""

from __future__ import annotations

import json

import numpy as np
import pytest

import synthetic_gen
from tallfit.cli import main

FEATS = ",".join(synthetic_gen.FEATURES)


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet")
    synthetic_gen.generate(root / "train", 12_000, seed=4, files=2, hosts=300)
    return root / "train"


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_validate_report_json_plot_and_model(fleet, tmp_path, capsys):
    rep, png, svg, model = (tmp_path / n for n in ("r.json", "p.png", "p.svg", "m.json"))
    code, out, err = _run(capsys, "validate", fleet, "--target", "power_w", "--features", FEATS, "--folds", 5,
                          "--fold-key", "host_id", "--holdout", 0.2, "--ridge-path", "auto", "--select", "forward",
                          "--test-terms", "disk_iops,net_gbps", "--out-json", rep, "--plot", png, "--out", model,
                          "--no-progress", "--batch-rows", 3000)
    assert code == 0, err
    assert "CV MSE" in out and "one-SE rule" in out and "optimistic" in out
    doc = json.loads(rep.read_text())
    assert doc["cv"]["folds"] == 5 and doc["cv"]["key"] == "host_id"
    assert sum(doc["cv"]["fold_rows"]) + doc["holdout"]["rows"] == 12_000
    # the demo noise is 8 W, so a correct model's held-out RMSE is close to it (synthetic_gen truth)
    assert 7.0 < doc["holdout"]["rmse"] < 9.0 and 7.0 < doc["cv"]["rmse"] < 9.0
    assert len(doc["ridge"]["penalties"]) == 50 and doc["selection"]["caution"]
    assert doc["nested_tests"][0]["p_value"] < 1e-6
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    saved = json.loads(model.read_text())
    assert "ridge" in saved["model"]["options"]
    pred = tmp_path / "pred.parquet"
    code, _, err = _run(capsys, "predict", model, fleet, "--out", pred, "--no-progress")
    assert code == 0, err
    code, _, err = _run(capsys, "validate", fleet, "--target", "power_w", "--features", FEATS, "--folds", 3,
                        "--ridge-path", "0.1:1e5:12", "--plot", svg, "--json", "--no-progress")
    assert code == 0, err
    assert svg.read_text().lstrip().startswith("<?xml")


@pytest.mark.parametrize("extra,message", [
    (["--folds", "1"], "folds must be 0"),
    (["--fold-key", "hostid"], "column 'hostid' not found"),
    (["--holdout", "1.2"], "holdout fraction"),
    (["--ridge-path", "10:1"], "--ridge-path"),
    (["--plot", "p.pdf", "--ridge-path", "auto"], ".png or .svg"),
    (["--plot", "p.png"], "give --ridge-path"),
    (["--select", "best", "--criterion", "cv", "--folds", "0"], "needs folds"),
    (["--test-terms", "fan"], "not among the model's terms"),
])
def test_bad_input_is_one_clear_line_and_writes_nothing(fleet, tmp_path, capsys, extra, message):
    out_json = tmp_path / "r.json"
    argv = ["validate", fleet, "--target", "power_w", "--features", FEATS, "--out-json", out_json,
            "--no-progress"] + [str(tmp_path / a) if a.startswith("p.") else a for a in extra]
    code, out, err = _run(capsys, *argv)
    assert code == 2
    assert message in err and "Traceback" not in err
    assert not out_json.exists()
    assert not list(tmp_path.glob("p.*"))


def test_split_is_reproducible_and_seed_dependent(fleet, capsys):
    runs = []
    for seed in (0, 0, 1):
        code, out, err = _run(capsys, "validate", fleet, "--target", "power_w", "--features", FEATS, "--folds", 4,
                              "--seed", seed, "--json", "--no-progress")
        assert code == 0, err
        runs.append(np.array(json.loads(out)["cv"]["fold_mse"]))
    assert np.array_equal(runs[0], runs[1]) and not np.array_equal(runs[0], runs[2])
