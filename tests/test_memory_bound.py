"""Peak memory of a fit does not grow with the number of rows (a property of the streaming design).

Each fit runs in a fresh interpreter that reports its own peak resident set size (getrusage
ru_maxrss), so the two measurements do not share allocations. Five times the rows may cost at
most 10 % (plus a few MB of allocator noise) more memory.
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
r = tallfit.fit(sys.argv[1], "power_w", feats, method=sys.argv[2], batch_rows=32768)
assert r.accumulator.n_used == int(sys.argv[3]), r.accumulator.n_used
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
    for rows in (200_000, 1_000_000):
        path = folder / f"fleet-{rows}.parquet"
        synthetic_gen.generate(path, rows, chunk_rows=100_000)
        paths[rows] = path
    return paths


def test_peak_rss_does_not_grow_with_rows(two_sizes, method="qr"):
    small = _peak_kb(two_sizes[200_000], method, 200_000)
    big = _peak_kb(two_sizes[1_000_000], method, 1_000_000)
    assert big <= small * 1.10 + 8 * 1024, f"peak RSS grew from {small / 1024:.0f} MB to {big / 1024:.0f} MB"
    assert big < 1024 * 1024  # below 1 GB
