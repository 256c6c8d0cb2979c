"""generate(): draw the dataset chunk by chunk and write it with its truth record."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from contextlib import closing
from pathlib import Path
from typing import Callable, Iterable, Iterator

import pyarrow as pa

from . import layout, record, writers
from .options import Options
from .scenario import Scenario

DEFAULT_CHUNK_ROWS = 250_000


def _positive_int(name: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if value < 1:
        raise ValueError(f"{name} must be >= 1, got {value}")
    return value


def _seed(seed: object) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    return seed


def _ahead(fn: Callable, items: Iterable[tuple]) -> Iterator:
    """``fn(*item)`` for each item, computed one item ahead in a worker thread."""
    with ThreadPoolExecutor(max_workers=1) as pool:
        pending = None
        for item in items:
            future = pool.submit(fn, *item)
            if pending is not None:
                yield pending.result()
            pending = future
        if pending is not None:
            yield pending.result()


def _check(rows: int, fmt: str, files: int, chunk_rows: int) -> None:
    for name, value in (("rows", rows), ("files", files), ("chunk_rows", chunk_rows)):
        _positive_int(name, value)
    if fmt not in writers.FORMATS:
        raise ValueError(f"unknown format {fmt!r}; choose one of {', '.join(writers.FORMATS)}")
    if files > rows:
        raise ValueError(f"files ({files}) must not exceed rows ({rows})")


def truth(rows: int, *, seed: int = 0, fmt: str = "parquet", files: int = 1, by_day: bool | str = False,
          chunk_rows: int = DEFAULT_CHUNK_ROWS, **options) -> dict:
    """The truth record ``generate`` would write, without generating (no "files"/"observed")."""
    _check(rows, fmt, files, chunk_rows)
    by = layout.normalise_by_day(by_day)
    s = Scenario(_seed(seed), Options(**options))
    return record.build(s, rows, fmt=fmt, chunk_rows=chunk_rows, files=files, by_day=by,
                        text_ts=fmt in writers.TEXT_FORMATS, with_day=by != "hive")


def generate_table(rows: int, *, seed: int = 0, start_row: int = 0, **options) -> pa.Table:
    """Rows ``[start_row, start_row + rows)`` in memory (same values as the written files)."""
    s = Scenario(_seed(seed), Options(**options))
    return s.draw(start_row, start_row + _positive_int("rows", rows)).table


def generate(out_path: str | Path, rows: int, *, seed: int = 0, fmt: str = "parquet", files: int = 1,
             by_day: bool | str = False, chunk_rows: int = DEFAULT_CHUNK_ROWS, class_effects: bool = False,
             correlated: bool = False, missing: float = 0.0, heteroskedastic: bool = False,
             outliers: float = 0.0, host_effects: bool = False, quadratic: bool = False,
             extra_features: int = 0, hosts: int = 2000, overwrite: bool = False) -> dict:
    """Write ``rows`` rows under ``out_path`` (a directory, or one file if it ends in .parquet/.csv/.jsonl).

    Values depend only on the seed, the options and the row index. Returns the truth dict that is
    also written as truth.json (or <stem>.truth.json beside a single file); its "files" are relative
    to the truth file's directory.
    """
    _check(rows, fmt, files, chunk_rows)
    opts = Options(class_effects=bool(class_effects), correlated=bool(correlated), missing=missing,
                   heteroskedastic=bool(heteroskedastic), outliers=outliers, host_effects=bool(host_effects),
                   quadratic=bool(quadratic), extra_features=extra_features, hosts=hosts)
    scenario = Scenario(_seed(seed), opts)
    by = layout.normalise_by_day(by_day)
    plan = layout.plan(out_path, rows, fmt, files, by, opts.hosts)
    layout.prepare(plan, overwrite)
    text_ts = fmt in writers.TEXT_FORMATS
    info = record.build(scenario, rows, fmt=fmt, chunk_rows=chunk_rows, files=files, by_day=by,
                        text_ts=text_ts, with_day=plan.with_day)

    def ranges(seg: layout.Segment) -> range:
        return range(seg.start, seg.stop, chunk_rows)

    def draw(lo: int, hi: int):
        return scenario.draw(lo, hi, text_ts=text_ts, with_day=plan.with_day)

    # Drawing the next chunk overlaps writing the current one; at most three chunks live at once.
    chunks = _ahead(draw, ((lo, min(lo + chunk_rows, seg.stop)) for seg in plan.segments for lo in ranges(seg)))
    nulls = dict.fromkeys(scenario.features, 0)
    outlier_rows = 0
    with closing(chunks):
        for seg in plan.segments:
            final = plan.root / seg.relpath
            final.parent.mkdir(parents=True, exist_ok=True)
            with writers.open_sink(fmt, final) as sink:
                for _ in ranges(seg):
                    chunk = next(chunks)
                    sink.write(chunk.table)
                    outlier_rows += chunk.outlier_rows
                    for name in nulls:
                        nulls[name] += chunk.table.column(name).null_count

    info["files"] = [seg.relpath for seg in plan.segments]
    info["rows_per_file"] = [seg.stop - seg.start for seg in plan.segments]
    info["observed"] = {"null_counts": nulls, "outlier_rows": outlier_rows}
    writers.write_json(plan.truth_path, info)
    return info
