"""Design options on the command line: each bad input a one-line message, exit 2, no output."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tallfit.cli import main


@pytest.fixture
def data(tmp_path):
    rng = np.random.default_rng(3)
    n = 300
    t = pa.table({
        "cpu_util": rng.uniform(0, 1, n),
        "disk_iops": rng.uniform(100, 5000, n),
        "machine_class": rng.choice(["compute-a", "storage-b", "gpu-c"], n),
        "rack": ["r01"] * n,
        "w": rng.uniform(0.5, 2, n),
        "power_w": rng.normal(300, 20, n),
    })
    pq.write_table(t, tmp_path / "fleet.parquet")
    return tmp_path


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _fit(capsys, data, *more):
    return _run(capsys, "fit", data / "fleet.parquet", "--target", "power_w", "--out", data / "m.json",
                "--no-progress", *more)


def test_design_options_fit_and_show(data, capsys):
    code, out, err = _fit(capsys, data, "--features", "cpu_util", "--categorical", "machine_class",
                          "--reference", "machine_class=gpu-c", "--derive", "log_iops = ln(disk_iops + 1)",
                          "--where", "cpu_util > 0.1", "--weights", "w", "--poly", "cpu_util=2")
    assert code == 0, err
    doc = json.loads(_run(capsys, "show", data / "m.json", "--json")[1])
    names = [t["name"] for t in doc["terms"]]
    assert names == ["(intercept)", "cpu_util", "log_iops", "cpu_util_pow2",
                     "machine_class[compute-a]", "machine_class[storage-b]"]
    assert doc["levels"]["machine_class"]["reference"] == "gpu-c"
    assert doc["weights"]["column"] == "w"
    assert doc["dropped_rows"]["by_column"]["(where filter)"] > 0


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--features", "cpu_util", "--derive", "x = ln(disk_iops +"], "not a valid SQL expression"),
        (["--features", "cpu_util", "--derive", "x = ln(disk_iop + 1)"], "disk_iop"),
        (["--features", "cpu_util", "--where", "cpu_utl > 3"], "cpu_utl"),
        (["--features", "cpu_util", "--categorical", "rack"], "only one level"),
        (["--features", "cpu_util", "--missing", "cpu_util"], "COLUMN=VALUE"),
        (["--features", "cpu_util", "--missing", "cpu_util=sometimes"], "unknown missing-value policy"),
        ([], "no terms"),
        (["--features", "cpu_util", "--categorical", "machine_class", "--drop-level", "machine_class"],
         "COLUMN=LEVEL"),
        (["--features", "cpu_util", "--categorical", "machine_class", "--drop-level", "machine_class=tpu-z"],
         "cannot drop level 'tpu-z'"),
    ],
)
def test_bad_design_input(data, capsys, args, needle):
    code, _, err = _fit(capsys, data, *args)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, err
    assert len(lines) == 1 and needle in lines[0], err
    assert not (data / "m.json").exists()


def test_negative_weight_names_file_and_rows(data, capsys):
    t = pq.read_table(data / "fleet.parquet")
    w = t["w"].to_numpy().copy()
    w[250] = -1.0
    pq.write_table(t.set_column(4, "w", pa.array(w)), data / "fleet.parquet")
    code, _, err = _fit(capsys, data, "--features", "cpu_util", "--weights", "w", "--batch-rows", "100")
    assert code == 2
    assert "fleet.parquet, rows 200-299" in err and "weight column 'w'" in err
    assert not (data / "m.json").exists()


def test_drop_level_option_equals_the_api(data, capsys):
    import tallfit

    code, _, err = _fit(capsys, data, "--features", "cpu_util", "--categorical", "machine_class",
                        "--reference", "machine_class=gpu-c", "--drop-level", "machine_class=storage-b",
                        "--absorb", "rack", "--weights", "w")
    assert code == 0, err
    doc = json.loads(_run(capsys, "show", data / "m.json", "--json")[1])
    direct = tallfit.fit(str(data / "fleet.parquet"), "power_w", ["cpu_util"], categorical=["machine_class"],
                         reference={"machine_class": "gpu-c"}, drop_levels={"machine_class": ["storage-b"]},
                         absorb="rack", weights="w")
    assert [t["name"] for t in doc["terms"]] == direct.terms == ["cpu_util", "machine_class[compute-a]"]
    np.testing.assert_allclose([t["estimate"] for t in doc["terms"]], direct.inference.estimate, rtol=1e-12)
