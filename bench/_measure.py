"""Shared by the bench scripts: data paths, the columns of a generated file, timing and peak RSS.

Every measurement runs in its own process (``run_child``) so its peak resident memory is its own:
the child reports ``ru_maxrss`` of itself, the parent checks it against RUSAGE_CHILDREN.
"""

from __future__ import annotations

import json
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"
BASE_FEATURES = ("cpu_util", "mem_bw_gbps", "disk_iops", "net_gbps", "inlet_temp_c", "fan_rpm")
TARGET = "power_w"


def features_for(p: int) -> list[str]:
    """The p numeric features of a file generated with extra_features = p - 6."""
    from synthetic_gen.scenario import extra_feature_names

    return list(BASE_FEATURES) + list(extra_feature_names(p - len(BASE_FEATURES)))


def p20_file(rows: int):
    """bench/out/p20_n{rows}_zstd.parquet (run_all.py writes it), or a clear stop when it is missing."""
    path = OUT / f"p20_n{rows}_zstd.parquet"
    if not path.exists():
        raise SystemExit(f"{path} is missing: run bench/run_all.py first (it writes the data)")
    return path


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def report(result: dict) -> None:
    """Print a child's result as one JSON line (the parent reads the last line)."""
    result["peak_rss_mb"] = round(peak_rss_mb(), 1)
    print(json.dumps(result), flush=True)


def timed(fn) -> tuple[float, object]:
    t = time.perf_counter()
    out = fn()
    return time.perf_counter() - t, out


def median_seconds(fn, repeats: int) -> float:
    """Median wall time of `repeats` in-process calls of fn (for passes timed inside one process)."""
    runs = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        runs.append(time.perf_counter() - t)
    return statistics.median(runs)


def run_child(script: str, *args: str, env: dict | None = None, timeout: float = 3600) -> dict:
    """Run bench/<script> in a fresh interpreter and return its JSON result (plus the parent's RSS view)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    full_env = dict(os.environ)
    full_env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), str(ROOT)] + [full_env.get("PYTHONPATH", "")])
    full_env.update(env or {})
    proc = subprocess.run([sys.executable, str(HERE / script), *map(str, args)], capture_output=True, text=True,
                          env=full_env, timeout=timeout)
    if proc.returncode != 0:
        raise RuntimeError(f"{script} {' '.join(map(str, args))} failed:\n{proc.stderr[-3000:]}")
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    after = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if after > before:  # the children's maximum grew: it was this child
        result["peak_rss_mb_parent_view"] = round(after / 1024.0, 1)
    return result


def median_runs(script: str, args: list, repeats: int) -> dict:
    """Median wall time of `repeats` child runs; the largest peak RSS of them."""
    runs = [run_child(script, *args) for _ in range(repeats)]
    out = dict(runs[-1])
    out["seconds"] = statistics.median(r["seconds"] for r in runs)
    out["all_seconds"] = [round(r["seconds"], 3) for r in runs]
    out["peak_rss_mb"] = max(r["peak_rss_mb"] for r in runs)
    return out


def alternating_rounds(cases: dict, repeats: int) -> tuple[dict, dict]:
    """Wall and CPU seconds of each case, the cases one after the other in each of ``repeats``
    rounds (so every round's ratios compare runs made minutes apart at most)."""
    seconds: dict = {k: [] for k in cases}
    cpu: dict = {k: [] for k in cases}
    for _ in range(repeats):
        for name, run in cases.items():
            t, c = time.perf_counter(), time.process_time()
            run()
            seconds[name].append(time.perf_counter() - t)
            cpu[name].append(time.process_time() - c)
    return seconds, cpu
