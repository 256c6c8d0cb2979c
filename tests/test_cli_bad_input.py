"""Every kind of bad input gets a specific one-line message, exit code 2, and no output file."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tallfit.cli import main


def _table(n=200, seed=0, **extra):
    rng = np.random.default_rng(seed)
    cols = {
        "cpu_util": rng.uniform(0, 1, n),
        "inlet_temp_c": rng.normal(24, 3, n),
        "fan_rpm": rng.normal(6000, 500, n),
    }
    cols["power_w"] = 100 + 150 * cols["cpu_util"] + 2 * cols["inlet_temp_c"] + rng.normal(0, 5, n)
    cols.update(extra)
    return pa.table(cols)


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _fit(capsys, data, out, *more, features="cpu_util,inlet_temp_c"):
    return _run(capsys, "fit", data, "--target", "power_w", "--features", features, "--out", out, "--no-progress", *more)


def _one_error_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


def test_good_fit_writes_model(tmp_path, capsys):
    pq.write_table(_table(), tmp_path / "a.parquet")
    code, out, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json")
    assert code == 0, err
    assert (tmp_path / "m.json").exists()
    assert "cpu_util" in out


def test_missing_file(tmp_path, capsys):
    code, _, err = _fit(capsys, tmp_path / "nope.parquet", tmp_path / "m.json")
    assert code == 2
    assert "nope.parquet" in _one_error_line(err)
    assert not (tmp_path / "m.json").exists()


def test_empty_glob(tmp_path, capsys):
    code, _, err = _fit(capsys, tmp_path / "*.parquet", tmp_path / "m.json")
    assert code == 2
    line = _one_error_line(err)
    assert "*.parquet" in line
    assert not (tmp_path / "m.json").exists()


def test_unknown_column_suggests_nearest(tmp_path, capsys):
    pq.write_table(_table(), tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json", features="cpu_utl,inlet_temp_c")
    assert code == 2
    line = _one_error_line(err)
    assert "cpu_utl" in line and "cpu_util" in line
    assert not (tmp_path / "m.json").exists()


def test_no_rows_left_after_dropping(tmp_path, capsys):
    t = _table(50)
    t = t.set_column(0, "cpu_util", pa.array([None] * 50, pa.float64()))
    pq.write_table(t, tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json")
    assert code == 2
    line = _one_error_line(err)
    assert "no usable rows" in line and "cpu_util: 50" in line
    assert not (tmp_path / "m.json").exists()


def test_fewer_rows_than_parameters(tmp_path, capsys):
    pq.write_table(_table(2), tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json")
    assert code == 2
    assert "2 usable rows for 3 coefficients" in _one_error_line(err)
    assert not (tmp_path / "m.json").exists()


@pytest.mark.parametrize(
    "extra,named",
    [
        ({"rack_const": np.full(200, 3.0)}, "rack_const"),
        ({"cpu_copy": None}, "cpu_copy"),
    ],
)
def test_aliased_features_are_named(tmp_path, capsys, extra, named):
    t = _table()
    if "cpu_copy" in extra:
        extra = {"cpu_copy": 2.0 * t["cpu_util"].to_numpy() + 1.0}
    t = _table(**extra)
    pq.write_table(t, tmp_path / "a.parquet")
    feats = f"cpu_util,inlet_temp_c,{named}"
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json", features=feats)
    assert code == 2
    line = _one_error_line(err)
    assert named in line and "--drop-aliased" in line
    assert not (tmp_path / "m.json").exists()
    code, out, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json", "--drop-aliased", features=feats)
    assert code == 0, err
    assert f"fitted without aliased terms {named}" in out


def test_truncated_parquet_names_the_file(tmp_path, capsys):
    pq.write_table(_table(5000), tmp_path / "good.parquet")
    raw = (tmp_path / "good.parquet").read_bytes()
    (tmp_path / "bad.parquet").write_bytes(raw[: len(raw) // 2])
    code, _, err = _fit(capsys, tmp_path / "bad.parquet", tmp_path / "m.json")
    assert code == 2
    assert "bad.parquet" in _one_error_line(err)
    assert not (tmp_path / "m.json").exists()


def test_corrupt_csv_names_file_and_column(tmp_path, capsys):
    t = _table(30_000)
    lines = ["cpu_util,inlet_temp_c,fan_rpm,power_w"]
    for row in zip(*(t[c].to_pylist() for c in t.column_names)):
        lines.append(",".join(repr(v) for v in row))
    lines[25_000] = "0.5,hot,6000,200"  # beyond the leading block used to infer types
    (tmp_path / "a.csv").write_text("\n".join(lines) + "\n")
    code, _, err = _fit(capsys, tmp_path / "a.csv", tmp_path / "m.json")
    assert code == 2
    line = _one_error_line(err)
    assert "a.csv" in line and "inlet_temp_c" in line
    assert not (tmp_path / "m.json").exists()


def test_conflicting_schemas_name_both_files(tmp_path, capsys):
    d = tmp_path / "data"
    d.mkdir()
    pq.write_table(_table(), d / "day1.parquet")
    t = _table(seed=1)
    t = t.set_column(1, "inlet_temp_c", pa.array([f"{v:.1f}C" for v in t["inlet_temp_c"].to_pylist()]))
    pq.write_table(t, d / "day2.parquet")
    code, _, err = _fit(capsys, d, tmp_path / "m.json")
    assert code == 2
    line = _one_error_line(err)
    assert "day1.parquet" in line and "day2.parquet" in line and "inlet_temp_c" in line
    assert not (tmp_path / "m.json").exists()


def test_target_not_numeric(tmp_path, capsys):
    t = _table()
    t = t.set_column(3, "power_w", pa.array(["high"] * 200))
    pq.write_table(t, tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json")
    assert code == 2
    assert "target column 'power_w'" in _one_error_line(err)


def test_string_feature_suggests_categorical(tmp_path, capsys):
    pq.write_table(_table(region=pa.array(["north-1", "west-2"] * 100)), tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "m.json", features="cpu_util,region")
    assert code == 2
    line = _one_error_line(err)
    assert "'region'" in line and "categorical" in line


def test_output_directory_missing(tmp_path, capsys):
    pq.write_table(_table(), tmp_path / "a.parquet")
    code, _, err = _fit(capsys, tmp_path / "a.parquet", tmp_path / "no-such-dir" / "m.json")
    assert code == 2
    assert "does not exist" in _one_error_line(err)


def test_output_directory_not_writable(tmp_path, capsys, monkeypatch):
    import os

    import tallfit.atomic

    pq.write_table(_table(), tmp_path / "a.parquet")
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    if os.access(ro, os.W_OK):
        # root may write anywhere: simulate the permission answer a normal user gets
        real = os.access
        monkeypatch.setattr(tallfit.atomic.os, "access", lambda p, m: False if str(p) == str(ro) else real(p, m))
    try:
        code, _, err = _fit(capsys, tmp_path / "a.parquet", ro / "m.json")
        assert code == 2
        assert "not writable" in _one_error_line(err)
        assert not (ro / "m.json").exists()
    finally:
        ro.chmod(0o700)


def test_predict_failure_keeps_existing_output(tmp_path, capsys):
    d = tmp_path / "new"
    d.mkdir()
    pq.write_table(_table(), tmp_path / "train.parquet")
    assert _fit(capsys, tmp_path / "train.parquet", tmp_path / "m.json")[0] == 0
    pq.write_table(_table(500), d / "a.parquet")
    raw = (d / "a.parquet").read_bytes()
    (d / "b.parquet").write_bytes(raw[: len(raw) // 3])
    out = tmp_path / "pred.parquet"
    out.write_bytes(b"previous predictions")
    code, _, err = _run(capsys, "predict", tmp_path / "m.json", d, "--out", out, "--no-progress")
    assert code == 2
    assert "b.parquet" in _one_error_line(err)
    assert out.read_bytes() == b"previous predictions"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.json", "new", "pred.parquet", "train.parquet"]
