"""Tests for the synthetic server-fleet telemetry generator (synthetic_gen)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.dataset as ds
import pyarrow.json as pa_json
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings, strategies as st

import synthetic_gen
from synthetic_gen import FEATURES, NOISE_SD, TARGET, TRUE_COEFFICIENTS, generate, generate_table, truth
from synthetic_gen.cli import main
from synthetic_gen.options import Options
from synthetic_gen.scenario import Scenario
from synthetic_gen.streams import BLOCK_ROWS

REPO = Path(__file__).resolve().parents[1]
LABELS = ["host_id", "rack", "region", "machine_class"]


def _read(path: Path) -> pa.Table:
    return pq.read_table(path)


def _data_files(root: Path) -> set[str]:
    return {p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file() and p.name != "truth.json"}


def _plain(table: pa.Table) -> pa.Table:
    """Decode dictionary columns so in-memory tables compare equal to tables read back from files."""
    return pa.table({n: (c.cast(c.type.value_type) if pa.types.is_dictionary(c.type) else c)
                     for n, c in zip(table.column_names, table.columns)})


def _ols(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """OLS estimate, textbook standard errors sqrt(diag(s^2 (X'X)^-1)) with s^2 = RSS / (n - p), and s."""
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    resid = y - X @ beta
    n, p = X.shape
    s2 = resid @ resid / (n - p)
    se = np.sqrt(np.diag(s2 * np.linalg.inv(X.T @ X)))
    return beta, se, float(np.sqrt(s2))


def _design(table: pa.Table, features) -> np.ndarray:
    return np.column_stack([np.ones(table.num_rows)] + [table[f].to_numpy() for f in features])


def _true_residual(table: pa.Table) -> np.ndarray:
    """power_w minus the numeric part of the true model."""
    b = TRUE_COEFFICIENTS
    fit = b["intercept"] + sum(b[f] * table[f].to_numpy() for f in FEATURES)
    return table[TARGET].to_numpy() - fit


# ---------------------------------------------------------------- determinism


def test_same_seed_identical_different_seed_differs():
    a = generate_table(5_000, seed=7, missing=0.05, outliers=0.01)
    b = generate_table(5_000, seed=7, missing=0.05, outliers=0.01)
    c = generate_table(5_000, seed=8, missing=0.05, outliers=0.01)
    assert a.equals(b)
    for name in (*FEATURES, TARGET):
        assert not a[name].equals(c[name]), name
    assert a["machine_class"].to_pylist() != c["machine_class"].to_pylist()


@settings(max_examples=12, deadline=None)
@given(cuts=st.lists(st.integers(1, 3 * BLOCK_ROWS), min_size=1, max_size=4, unique=True),
       correlated=st.booleans(), seed=st.integers(0, 2**32))
def test_values_depend_only_on_seed_and_row(cuts, correlated, seed):
    stop = 3 * BLOCK_ROWS + 5
    bounds = [0, *sorted(cuts), stop]
    opts = Options(correlated=correlated, missing=0.1, extra_features=2)
    whole = Scenario(seed, opts).draw(0, stop).table
    s = Scenario(seed, opts)
    parts = [s.draw(lo, hi).table for lo, hi in zip(bounds[:-1], bounds[1:]) if hi > lo]
    assert _plain(pa.concat_tables([_plain(p) for p in parts])).equals(_plain(whole))


def test_option_toggles_keep_the_other_values():
    base = generate_table(20_000, seed=3)
    holed = generate_table(20_000, seed=3, missing=0.2)
    for name in FEATURES:
        keep = pc.is_valid(holed[name])
        assert pc.filter(holed[name], keep).equals(pc.filter(base[name], keep))
    assert holed[TARGET].equals(base[TARGET])  # nulls are applied after power is computed


# ---------------------------------------------------------------- layout and row counts


@pytest.mark.parametrize("rows,chunk_rows,files", [(1, 1, 1), (10_001, 333, 3), (2 * BLOCK_ROWS + 1, BLOCK_ROWS, 4)])
def test_row_counts_exact_across_chunks_and_files(tmp_path, rows, chunk_rows, files):
    out = tmp_path / "ds"
    info = generate(out, rows, seed=1, files=files, chunk_rows=chunk_rows)
    assert sorted(info["files"]) == sorted(_data_files(out))
    assert len(info["files"]) == files and sum(info["rows_per_file"]) == rows
    for rel, n in zip(info["files"], info["rows_per_file"]):
        meta = pq.ParquetFile(out / rel).metadata
        assert meta.num_rows == n
        assert meta.num_row_groups == -(-n // chunk_rows)  # one row group per chunk
    got = pa.concat_tables(_read(out / rel) for rel in info["files"])
    assert got.equals(_plain(generate_table(rows, seed=1)))


def test_chunk_size_does_not_change_the_data(tmp_path):
    a = generate(tmp_path / "a.parquet", 70_001, seed=5, chunk_rows=7_777, heteroskedastic=True)
    b = generate(tmp_path / "b.parquet", 70_001, seed=5, chunk_rows=100_000, heteroskedastic=True)
    assert a["files"] == ["a.parquet"] and (tmp_path / "a.truth.json").is_file()
    assert _read(tmp_path / "a.parquet").equals(_read(tmp_path / "b.parquet"))
    assert b["chunk_rows"] == 100_000


def test_day_column_matches_timestamps_across_chunks(tmp_path):
    generate(tmp_path / "d.parquet", 30_000, seed=2, hosts=10, chunk_rows=4_000)
    t = _read(tmp_path / "d.parquet")
    assert t["day"].equals(pc.strftime(t["ts"], format="%Y-%m-%d"))
    assert t["day"].value_counts().to_pylist() == [
        {"values": "2026-11-01", "counts": 14_400}, {"values": "2026-11-02", "counts": 14_400},
        {"values": "2026-11-03", "counts": 1_200}]
    minutes = pc.divide(pc.subtract(t["ts"].cast(pa.int64()), t["ts"][0].value), 60_000_000).to_numpy()
    assert np.array_equal(minutes, np.arange(30_000) // 10)  # row i is host i % hosts at minute i // hosts
    assert t["host_id"].to_pylist()[:11] == [f"h{i:06d}" for i in range(10)] + ["h000000"]


def test_by_day_hive_layout(tmp_path):
    hosts, rows = 10, 40_000  # 14_400 rows per day -> three days, the last one partial
    out = tmp_path / "hive"
    info = generate(out, rows, seed=2, by_day=True, hosts=hosts, chunk_rows=5_000)
    assert info["files"] == [f"day=2026-11-0{d}/part-0.parquet" for d in (1, 2, 3)]
    assert info["rows_per_file"] == [14_400, 14_400, rows - 2 * 14_400]
    for rel in info["files"]:
        t = _read(out / rel)
        assert "day" not in t.column_names
        dates = set(pc.strftime(t["ts"], format="%Y-%m-%d").to_pylist())
        assert dates == {rel.split("/")[0].removeprefix("day=")}
    table = ds.dataset(out, format="parquet", partitioning="hive", exclude_invalid_files=True).to_table()
    assert table.num_rows == rows
    lazy = pl.scan_parquet(out / "**" / "*.parquet", hive_partitioning=True)
    assert lazy.select(pl.col("day").n_unique()).collect().item() == 3


def test_by_day_flat_layout_with_parts(tmp_path):
    out = tmp_path / "flat"
    info = generate(out, 20_000, seed=2, by_day="flat", files=2, hosts=10)
    assert info["files"] == ["2026-11-01-part-0.parquet", "2026-11-01-part-1.parquet",
                             "2026-11-02-part-0.parquet", "2026-11-02-part-1.parquet"]
    for rel in info["files"]:
        t = _read(out / rel)
        assert set(t["day"].to_pylist()) == {rel[:10]}
        assert set(pc.strftime(t["ts"], format="%Y-%m-%d").to_pylist()) == {rel[:10]}
    assert sum(info["rows_per_file"]) == 20_000


# ---------------------------------------------------------------- formats


@pytest.mark.parametrize("fmt,name", [("parquet", "f.parquet"), ("parquet-plain", "f.parquet"),
                                      ("csv", "f.csv"), ("jsonl", "f.jsonl")])
def test_each_format_readable_with_expected_columns(tmp_path, fmt, name):
    path = tmp_path / name
    info = generate(path, 3_000, seed=4, fmt=fmt, chunk_rows=1_000, missing=0.05)
    expected_cols = [c["name"] for c in info["columns"]]
    assert expected_cols == ["ts", "day", *LABELS, *FEATURES, TARGET]
    if fmt.startswith("parquet"):
        t = pq.read_table(path)
        codec = pq.ParquetFile(path).metadata.row_group(0).column(6).compression
        assert codec == ("ZSTD" if fmt == "parquet" else "UNCOMPRESSED")
        assert t.schema.field("ts").type == pa.timestamp("us", tz="UTC")
        df = pl.read_parquet(path)
    elif fmt == "csv":
        t = pa_csv.read_csv(path)
        df = pl.read_csv(path)
    else:
        t = pa_json.read_json(path)
        df = pl.read_ndjson(path)
    assert t.column_names == expected_cols and df.columns == expected_cols
    assert t.num_rows == df.height == 3_000
    assert pa.types.is_string(t.schema.field("host_id").type)
    ref = generate_table(3_000, seed=4, missing=0.05)
    for col in (*FEATURES, TARGET):  # text formats round-trip floats exactly
        got = t[col].cast(pa.float64())
        assert got.equals(ref[col]), col
        assert df[col].null_count() == ref[col].null_count
    assert t["host_id"].to_pylist() == ref["host_id"].to_pylist()


# ---------------------------------------------------------------- options


def test_missing_fraction_close_to_requested(tmp_path):
    info = generate(tmp_path / "m", 50_000, seed=6, missing=0.1, extra_features=2)
    t = _read(tmp_path / "m" / info["files"][0])
    for name in info["features"]:
        frac = t[name].null_count / t.num_rows
        assert abs(frac - 0.1) < 0.01, (name, frac)  # sd of the fraction is ~0.0013
        assert info["observed"]["null_counts"][name] == t[name].null_count
    assert t[TARGET].null_count == 0 and t["host_id"].null_count == 0


@pytest.mark.parametrize("case", ["plain", "class_effects", "quadratic", "extra_features"])
def test_ols_recovers_true_coefficients(case):
    opts = {"class_effects": {"class_effects": True}, "quadratic": {"quadratic": True},
            "extra_features": {"extra_features": 5}}.get(case, {})
    t = generate_table(50_000, seed=11, **opts)
    info = truth(50_000, seed=11, **opts)
    names = ["intercept", *info["features"]]
    true = [info["coefficients"][n] for n in names]
    X = _design(t, info["features"])
    if case == "class_effects":
        for factor in ("machine_class", "region"):
            spec = info["terms"]["class_effects"][factor]
            labels = np.asarray(t[factor].to_pylist())
            for level, offset in spec["offsets_w"].items():
                if level != spec["reference"]:  # treatment coding against the stated reference level
                    X = np.column_stack([X, labels == level])
                    names.append(level)
                    true.append(offset)
    if case == "quadratic":
        q = info["terms"]["quadratic"]
        X = np.column_stack([X, (t["inlet_temp_c"].to_numpy() - 24.0) ** 2])
        names.append(q["term"])
        true.append(q["coefficient"])
    beta, se, s = _ols(X, t[TARGET].to_numpy())
    z = (beta - np.asarray(true)) / se
    assert np.all(np.abs(z) < 4), dict(zip(names, z.round(2)))
    assert abs(s - NOISE_SD) < 0.05 * NOISE_SD
    assert se[names.index("cpu_util")] < 1.0  # precise enough for the check to mean something


def test_class_effects_bias_a_numeric_only_fit():
    t = generate_table(50_000, seed=11, class_effects=True)
    beta, se, _ = _ols(_design(t, FEATURES), t[TARGET].to_numpy())
    true = np.array([TRUE_COEFFICIENTS[n] for n in ("intercept", *FEATURES)])
    assert np.max(np.abs(beta - true) / se) > 10


def test_correlated_features():
    corr = np.corrcoef(*(generate_table(50_000, seed=2, correlated=True)[c].to_numpy()
                         for c in ("cpu_util", "mem_bw_gbps")))[0, 1]
    plain = np.corrcoef(*(generate_table(50_000, seed=2)[c].to_numpy() for c in ("cpu_util", "mem_bw_gbps")))[0, 1]
    assert corr > 0.8 and abs(plain) < 0.1


def test_heteroskedastic_noise_follows_stated_formula():
    t = generate_table(50_000, seed=9, heteroskedastic=True)
    cpu, resid = t["cpu_util"].to_numpy(), _true_residual(t)
    for lo, hi in ((0.1, 0.25), (0.45, 0.55), (0.7, 0.9)):
        sel = (cpu >= lo) & (cpu < hi)
        expected = NOISE_SD * np.sqrt(np.mean((0.3 + 1.5 * cpu[sel]) ** 2))
        assert abs(resid[sel].std() / expected - 1) < 0.06, (lo, hi)


def test_outliers_are_counted_and_near_requested(tmp_path):
    info = generate(tmp_path / "o.parquet", 50_000, seed=12, outliers=0.02)
    t = _read(tmp_path / "o.parquet")
    spikes = _true_residual(t) > 200  # noise sd is 8; spikes are >= 250 W
    assert int(spikes.sum()) == info["observed"]["outlier_rows"]
    assert abs(spikes.mean() - 0.02) < 0.004


def test_host_offsets_match_truth_and_bias_pooled_fit():
    t = generate_table(50_000, seed=13, host_effects=True)
    offsets = truth(50_000, seed=13, host_effects=True)["terms"]["host_effects"]["offsets_w"]
    means = (pl.DataFrame({"h": t["host_id"].to_pylist(), "r": _true_residual(t)})
             .group_by("h").agg(pl.col("r").mean()).sort("h"))
    stated = np.array([offsets[h] for h in means["h"]])
    assert np.corrcoef(means["r"].to_numpy(), stated)[0, 1] > 0.98
    beta, se, _ = _ols(_design(t, FEATURES), t[TARGET].to_numpy())
    assert (beta[1] - TRUE_COEFFICIENTS["cpu_util"]) / se[1] > 10


def test_extra_feature_names_widen_with_k():
    info = truth(10, extra_features=120)
    assert info["features"][6:9] == ["x001", "x002", "x003"] and info["features"][-1] == "x120"
    assert len(info["coefficients"]) == 1 + 6 + 120


# ---------------------------------------------------------------- truth file


def test_truth_file_consistent(tmp_path):
    out = tmp_path / "t"
    info = generate(out, 12_345, seed=21, files=2, class_effects=True, outliers=0.01, quadratic=True)
    on_disk = json.loads((out / "truth.json").read_text())
    assert on_disk == info
    assert sorted(info["files"]) == sorted(_data_files(out))
    assert info["seed"] == 21 and info["rows"] == 12_345 and info["target"] == TARGET
    assert info["features"] == list(FEATURES)
    assert list(info["coefficients"]) == ["intercept", *FEATURES]
    assert {k: v for k, v in info["coefficients"].items()} == dict(TRUE_COEFFICIENTS)
    assert info["options"]["class_effects"] and info["options"]["quadratic"]
    assert info["noise"]["sd"] == NOISE_SD
    for rel in info["files"]:
        assert pq.read_schema(out / rel).names == [c["name"] for c in info["columns"]]
    described = truth(12_345, seed=21, files=2, class_effects=True, outliers=0.01, quadratic=True)
    assert described == {k: v for k, v in info.items() if k not in ("files", "rows_per_file", "observed")}


def test_public_api_surface():
    assert set(synthetic_gen.__all__) >= {"generate", "truth", "FEATURES", "TRUE_COEFFICIENTS"}
    with pytest.raises(TypeError):
        TRUE_COEFFICIENTS["cpu_util"] = 0.0  # read-only mapping


# ---------------------------------------------------------------- safety and errors


def test_overwrite_replaces_only_a_previous_dataset(tmp_path):
    out = tmp_path / "o"
    generate(out, 3_000, files=3)
    with pytest.raises(FileExistsError, match="not empty"):
        generate(out, 3_000)
    generate(out, 3_000, files=2, overwrite=True)
    assert _data_files(out) == {"part-0.parquet", "part-1.parquet"}
    (out / "notes.txt").write_text("keep me")
    with pytest.raises(FileExistsError, match="notes.txt"):
        generate(out, 3_000, overwrite=True)
    assert (out / "notes.txt").exists() and (out / "part-1.parquet").exists()


def test_failed_write_leaves_no_file(tmp_path, monkeypatch):
    from synthetic_gen import writers

    def boom(self, table):
        raise RuntimeError("disk full")

    monkeypatch.setattr(writers._Parquet, "write", boom)
    with pytest.raises(RuntimeError, match="disk full"):
        generate(tmp_path / "x", 1_000)
    assert list((tmp_path / "x").iterdir()) == []


@pytest.mark.parametrize("kwargs,error,match", [
    ({"missing": 1.0}, ValueError, "missing must be a fraction"),
    ({"outliers": -0.1}, ValueError, "outliers must be a fraction"),
    ({"fmt": "xlsx"}, ValueError, "unknown format"),
    ({"files": 20}, ValueError, "must not exceed rows"),
    ({"seed": -1}, ValueError, "seed must be"),
    ({"chunk_rows": 0}, ValueError, "chunk_rows must be >= 1"),
    ({"extra_features": 1.5}, TypeError, "extra_features must be an integer"),
    ({"by_day": "weekly"}, ValueError, "by_day must be"),
])
def test_bad_arguments_raise_specific_errors(tmp_path, kwargs, error, match):
    with pytest.raises(error, match=match):
        generate(tmp_path / "bad", 10, **kwargs)


def test_single_file_path_rules(tmp_path):
    with pytest.raises(ValueError, match="does not match format"):
        generate(tmp_path / "a.csv", 10, fmt="parquet")
    with pytest.raises(ValueError, match="names one file"):
        generate(tmp_path / "a.parquet", 10, files=2)


# ---------------------------------------------------------------- CLI


def test_cli_writes_dataset_and_reports(tmp_path, capsys):
    out = tmp_path / "cli.csv"
    assert main([str(out), "--rows", "2_000", "--seed", "3", "--missing", "0.1", "--correlated"]) == 0
    assert "2,000 rows" in capsys.readouterr().out
    info = json.loads((tmp_path / "cli.truth.json").read_text())
    assert info["format"] == "csv" and info["options"]["correlated"] and info["options"]["missing"] == 0.1
    assert pa_csv.read_csv(out).num_rows == 2_000


def test_cli_errors(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main([str(tmp_path / "x"), "--rows", "10", "--missing", "1.5"])
    assert exc.value.code == 2 and "fraction" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main([str(tmp_path / "x"), "--rows", "1.5"])
    assert "whole number" in capsys.readouterr().err
    out = tmp_path / "y.parquet"
    assert main([str(out), "--rows", "10", "-q"]) == 0
    assert main([str(out), "--rows", "10"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("synthetic_gen: error:") and "already exists" in err and err.count("\n") == 1
    assert main([str(out), "--rows", "10", "--overwrite", "-q"]) == 0


# ---------------------------------------------------------------- memory

_MEMORY_PROBE = """
import json, sys, tempfile, tracemalloc
import pyarrow as pa
from synthetic_gen import generate, generate_table
full = generate_table(10_000).nbytes * 100  # size of a 1e6-row table held at once
tracemalloc.start()
peaks = []
with tempfile.TemporaryDirectory() as d:
    for rows in (200_000, 1_000_000):
        tracemalloc.reset_peak()
        generate(d + f"/r{rows}", rows, chunk_rows=100_000)
        peaks.append(tracemalloc.get_traced_memory()[1])
print(json.dumps({"full": full, "peaks": peaks, "arrow": pa.default_memory_pool().max_memory()}))
"""


def test_memory_stays_bounded_by_chunk_size():
    path = os.pathsep.join([str(REPO / "src"), str(REPO), os.environ.get("PYTHONPATH", "")])
    env = {**os.environ, "PYTHONPATH": path}
    run = subprocess.run([sys.executable, "-c", _MEMORY_PROBE], capture_output=True, text=True, env=env, cwd=REPO,
                         timeout=120)
    assert run.returncode == 0, run.stderr
    m = json.loads(run.stdout)
    small, large = m["peaks"]
    assert large < 0.4 * m["full"], m  # chunks of 100k rows, never the whole 1e6-row table
    assert large < 1.2 * small + 2**20, m  # five times the rows, same peak
    assert m["arrow"] < 0.1 * m["full"], m
