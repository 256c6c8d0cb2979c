"""Scoring a data set of several parts on every core: each part into a staging file, joined in
part order while later parts are scored. Properties checked: the output equals the one-stream
run's (rows, order, numbers), and a failing part leaves neither an output nor a staging file.
The predictions themselves are checked against statsmodels in test_reference_statsmodels.py."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.csv  # noqa: F401  (pa.csv)
import pyarrow.parquet as pq
import pytest

import tallfit
from tallfit.errors import TallfitError


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    rng = np.random.default_rng(12)
    folder = tmp_path_factory.mktemp("parts")
    for f in range(3):
        n = 300_000 + 1000 * f
        cpu = rng.uniform(0, 1, n)
        zone = rng.choice(["z1", "z2"], n)
        y = 100 + 150 * cpu + 5 * (zone == "z2") + rng.normal(0, 3, n)
        pq.write_table(pa.table({"id": np.arange(n) + f * 1_000_000, "cpu_util": cpu, "zone": zone, "power_w": y}),
                       folder / f"p{f}.parquet", row_group_size=50_000)
    return folder


def test_parts_on_every_core_equal_one_stream(files, tmp_path):
    model = tallfit.fit(str(files / "*.parquet"), "power_w", ["cpu_util"], categorical=["zone"])
    data = str(files / "*.parquet")
    one = tallfit.predict(model, data, out=tmp_path / "one.parquet", intervals=True, passthrough=["id"], workers=1)
    many = tallfit.predict(model, data, out=tmp_path / "many.csv", intervals=True, passthrough=["id"], workers=2)
    assert one.rows == many.rows == 903_000 and many.columns == one.columns
    a, b = pq.read_table(tmp_path / "one.parquet"), pa.csv.read_csv(tmp_path / "many.csv")
    np.testing.assert_array_equal(a["id"].to_numpy(), b["id"].to_numpy())
    np.testing.assert_allclose(b["pi_high"].to_numpy(), a["pi_high"].to_numpy(), rtol=1e-15)  # CSV keeps 17 digits
    assert sorted(p.name for p in tmp_path.iterdir()) == ["many.csv", "one.parquet"]


def test_a_failing_part_leaves_nothing(files, tmp_path):
    model = tallfit.fit(str(files / "*.parquet"), "power_w", ["cpu_util"], categorical=["zone"])
    bad = tmp_path / "data"
    bad.mkdir()
    for f in files.glob("*.parquet"):
        t = pq.read_table(f)
        if f.name == "p1.parquet":  # a level the model never saw, late in the data
            z = np.array(t["zone"].to_pylist())
            z[-5] = "z9"
            t = t.set_column(t.schema.get_field_index("zone"), "zone", pa.array(z))
        pq.write_table(t, bad / f.name, row_group_size=50_000)
    out = tmp_path / "pred.parquet"
    out.write_bytes(b"the previous output")
    with pytest.raises(TallfitError, match="z9"):
        tallfit.predict(model, str(bad / "*.parquet"), out=out, workers=2)
    assert out.read_bytes() == b"the previous output"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data", "pred.parquet"]
