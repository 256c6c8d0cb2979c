"""Peak memory of a fit, and of the second pass after it, does not grow with the number of rows
(a property of the streaming design).

Each fit runs in a fresh interpreter that reports its own peak resident set size (getrusage
ru_maxrss), so the two measurements do not share allocations. Ten times the rows (200,000 and
2,000,000) may cost at most 50 MB more: the extra 1.8 million rows are 101 MB as the seven float64
columns read, so a pass holding even half of them fails, while the fixed costs that come with more
row groups and parts (+20 to +37 MB measured, ± 10 MB from run to run) pass.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

import synthetic_gen

ROOT = Path(__file__).resolve().parents[1]
CHILD = """
import resource, sys
import tallfit
from synthetic_gen.scenario import FEATURES
feats = list(FEATURES)
mode = sys.argv[2]
if mode in ("qr", "gram"):
    r = tallfit.fit(sys.argv[1], "power_w", feats, method=mode, batch_rows=32768)
    assert r.accumulator.n_used == int(sys.argv[3]), r.accumulator.n_used
elif mode == "groups-pass":  # one model per region, then every region checked in one pass
    from tallfit.api import diagnose
    r = tallfit.fit(sys.argv[1], "power_w", feats, by="region", batch_rows=32768)
    out = diagnose(r, sys.argv[1], cluster="host_id", batch_rows=32768)
    assert sum(g["diagnostics"]["n_used"] for g in out["groups"].values()) == int(sys.argv[3])
else:  # a fit, then the second pass with every diagnostic (and the host key absorbed)
    from tallfit.api import diagnose
    absorb = "host_id" if mode == "absorbed-pass" else None
    r = tallfit.fit(sys.argv[1], "power_w", feats, absorb=absorb, batch_rows=32768)
    out = diagnose(r, sys.argv[1], cluster="host_id", batch_rows=32768)
    assert out["diagnostics"]["n_used"] == int(sys.argv[3]), out["diagnostics"]["n_used"]
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def _peak_kb(path: Path, method: str, rows: int) -> int:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), str(ROOT), env.get("PYTHONPATH", "")])
    out = subprocess.run([sys.executable, "-c", CHILD, str(path), method, str(rows)], capture_output=True,
                         text=True, env=env, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    return int(out.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def two_sizes(tmp_path_factory):
    folder = tmp_path_factory.mktemp("memory")
    paths = {}
    for rows in (200_000, 2_000_000):
        path = folder / f"fleet-{rows}.parquet"
        synthetic_gen.generate(path, rows, chunk_rows=100_000)
        paths[rows] = path
    return paths


GROWTH_KB = 50 * 1024


def test_peak_rss_does_not_grow_with_rows(two_sizes, method="qr"):
    small = _peak_kb(two_sizes[200_000], method, 200_000)
    big = _peak_kb(two_sizes[2_000_000], method, 2_000_000)
    assert big <= small + GROWTH_KB, f"peak RSS grew from {small / 1024:.0f} MB to {big / 1024:.0f} MB"
    assert big < 1024 * 1024  # below 1 GB


@pytest.mark.parametrize("mode", ["pass", "absorbed-pass", "groups-pass"])
def test_second_pass_peak_rss_does_not_grow_with_rows(two_sizes, mode):
    """Robust, clustered and diagnostic sums are bounded: O(clusters × terms), fixed grids, top-k
    rows, for an absorbed key O(levels × terms), and for every group of a per-group model checked
    at once the groups' sums and the rows they hold for their grids (a fixed share), none of
    them O(rows)."""
    small = _peak_kb(two_sizes[200_000], mode, 200_000)
    big = _peak_kb(two_sizes[2_000_000], mode, 2_000_000)
    assert big <= small + GROWTH_KB, f"peak RSS grew from {small / 1024:.0f} MB to {big / 1024:.0f} MB"
