"""The design cache: replayed passes equal streamed ones, it is cleaned up, and never required.

Reference: the blocks streamed from the source by engine.local.design_blocks (bit-for-bit
equality of the replayed design), and the CSV file read back by numpy (numpy.loadtxt).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

import tallfit
from tallfit.design.spec import ModelSpec
from tallfit.engine.cache import DesignPasses
from tallfit.errors import OutputError
from tallfit.inputs import as_source


@pytest.fixture
def csv_file(tmp_path, rng):
    n = 3000  # invented rows, property test
    t = pa.table({"cpu": rng.uniform(0, 1, n), "temp": rng.normal(25, 3, n), "power": rng.normal(300, 20, n)})
    path = tmp_path / "fleet.csv"
    pacsv.write_csv(t, path)
    return path


def test_replayed_passes_equal_the_stream_and_the_file(csv_file):
    spec = ModelSpec(target="power", features=("cpu", "temp"))
    with DesignPasses(as_source(csv_file), spec, batch_rows=700, cache=True) as passes:
        first = [A.copy() for A in passes.blocks()]  # streams and writes the cache
        assert passes.cached
        info = passes.cache_info
        assert info["status"] == "ready" and info["rows"] == 3000 and info["bytes"] == 3000 * 4 * 8
        assert Path(info["path"]).exists()
        second = list(passes.blocks())  # replays
        assert passes.passes == 2
    assert len(first) == len(second) == 5
    for a, b in zip(first, second):
        np.testing.assert_array_equal(a, b)
    ref = np.loadtxt(csv_file, delimiter=",", skiprows=1)  # reference: numpy reading the CSV
    np.testing.assert_array_equal(np.vstack(second)[:, 1:], ref[:, [0, 1, 2]])
    assert not Path(info["path"]).exists() and passes.cache_info["status"] == "removed"


def test_abandoned_pass_leaves_no_cache(csv_file):
    spec = ModelSpec(target="power", features=("cpu",))
    with DesignPasses(as_source(csv_file), spec, batch_rows=500, cache=True) as passes:
        it = passes.blocks()
        next(it)
        it.close()
        assert not passes.cached and passes.cache_info["status"] == "pending"
        assert sum(len(A) for A in passes.blocks()) == 3000 and passes.cached


def test_missing_spill_dir_is_a_clear_error(csv_file, tmp_path):
    with pytest.raises(OutputError, match="spill directory .* does not exist"):
        tallfit.fit(csv_file, "power", ["cpu"], solver="cg", solver_options={"cache": True, "spill_dir": tmp_path / "nope"})


def test_fit_with_cache_equals_fit_without(csv_file, tmp_path):
    plain = tallfit.fit(csv_file, "power", ["cpu", "temp"], solver="gd", batch_rows=800)
    cached = tallfit.fit(csv_file, "power", ["cpu", "temp"], solver="gd", batch_rows=800,
                         solver_options={"cache": True, "spill_dir": tmp_path})
    np.testing.assert_array_equal(plain.inference.estimate, cached.inference.estimate)
    info = cached.iterations["cache"]
    assert info["status"] == "removed" and info["path"].startswith(str(tmp_path))
    assert not any(p.name.startswith("tallfit-cache-") for p in tmp_path.iterdir())
