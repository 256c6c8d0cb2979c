"""Where rows go: a single file, N parts, or one file (or N parts) per day."""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path

from .scenario import MINUTES_PER_DAY, START

SUFFIXES = {"parquet": ".parquet", "parquet-plain": ".parquet", "csv": ".csv", "jsonl": ".jsonl", "ipc": ".arrow"}
FILE_SUFFIXES = {".parquet": {"parquet", "parquet-plain"}, ".csv": {"csv"}, ".jsonl": {"jsonl"}, ".ndjson": {"jsonl"},
                 ".arrow": {"ipc"}}
BY_DAY_LAYOUTS = ("hive", "flat")
TRUTH_NAME = "truth.json"


@dataclass(frozen=True)
class Segment:
    """One output file: its path relative to ``Plan.root`` and its row range."""

    relpath: str
    start: int
    stop: int


@dataclass(frozen=True)
class Plan:
    root: Path  # directory holding the truth file; segment paths are relative to it
    truth_path: Path
    segments: tuple[Segment, ...]
    single_file: bool
    by_day: str | None  # None, "hive" or "flat"

    @property
    def with_day(self) -> bool:
        """Hive layout keeps ``day`` in the directory name, not in the files."""
        return self.by_day != "hive"


def normalise_by_day(by_day: bool | str | None) -> str | None:
    if by_day is None or by_day is False:
        return None
    if by_day is True:
        return "hive"
    if by_day in BY_DAY_LAYOUTS:
        return by_day
    raise ValueError(f"by_day must be False, True, 'hive' or 'flat', got {by_day!r}")


def _split(start: int, stop: int, parts: int) -> list[tuple[int, int]]:
    n = stop - start
    cuts = [start + i * n // parts for i in range(parts + 1)]
    return list(zip(cuts[:-1], cuts[1:]))


def _day_ranges(rows: int, hosts: int) -> list[tuple[str, int, int]]:
    per_day = hosts * MINUTES_PER_DAY
    return [
        ((START + timedelta(days=d)).date().isoformat(), d * per_day, min(rows, (d + 1) * per_day))
        for d in range(-(-rows // per_day))
    ]


def plan(out_path: str | Path, rows: int, fmt: str, files: int, by_day: str | None, hosts: int) -> Plan:
    """Decide file names and row ranges; a path ending in a data suffix means one file."""
    out = Path(out_path)
    ext = SUFFIXES[fmt]
    if out.suffix.lower() in FILE_SUFFIXES:
        if fmt not in FILE_SUFFIXES[out.suffix.lower()]:
            raise ValueError(f"output file suffix {out.suffix!r} does not match format {fmt!r}")
        if files != 1 or by_day:
            raise ValueError(f"{out.name!r} names one file; give a directory for files > 1 or by-day output")
        seg = (Segment(out.name, 0, rows),)
        return Plan(out.parent, out.parent / f"{out.stem}.truth.json", seg, True, None)
    if by_day is None:
        width = len(str(files - 1))
        segs = [Segment(f"part-{i:0{width}d}{ext}", a, b) for i, (a, b) in enumerate(_split(0, rows, files))]
    else:
        segs = []
        for day, lo, hi in _day_ranges(rows, hosts):
            parts = _split(lo, hi, min(files, hi - lo))
            width = len(str(len(parts) - 1))
            for i, (a, b) in enumerate(parts):
                if by_day == "hive":
                    name = f"day={day}/part-{i:0{width}d}{ext}"
                else:
                    name = f"{day}{ext}" if len(parts) == 1 else f"{day}-part-{i:0{width}d}{ext}"
                segs.append(Segment(name, a, b))
    return Plan(out, out / TRUTH_NAME, tuple(segs), False, by_day)


def prepare(p: Plan, overwrite: bool) -> None:
    """Check the target is free; with ``overwrite``, remove only a previous generated dataset."""
    if p.single_file:
        target = p.root / p.segments[0].relpath
        for path in (target, p.truth_path):
            if path.exists() and not overwrite:
                raise FileExistsError(f"{path} already exists (pass overwrite=True or --overwrite to replace it)")
            if path.is_dir():
                raise IsADirectoryError(f"{path} is a directory")
        p.root.mkdir(parents=True, exist_ok=True)
        return
    if p.root.exists() and not p.root.is_dir():
        raise NotADirectoryError(f"{p.root} exists and is not a directory")
    present = sorted(q for q in p.root.rglob("*") if q.is_file()) if p.root.exists() else []
    if present:
        if not overwrite:
            raise FileExistsError(
                f"output directory {p.root} is not empty (pass overwrite=True or --overwrite to replace it)"
            )
        _remove_previous(p.root, present)
    p.root.mkdir(parents=True, exist_ok=True)


def _remove_previous(root: Path, present: list[Path]) -> None:
    truth = root / TRUTH_NAME
    try:
        listed = json.loads(truth.read_text())["files"]
    except (OSError, ValueError, KeyError, TypeError):
        raise FileExistsError(
            f"output directory {root} is not empty and holds no {TRUTH_NAME}; refusing to overwrite"
        ) from None
    known = {(root / f).resolve() for f in listed} | {truth.resolve()}
    strays = [q for q in present if q.resolve() not in known]
    if strays:
        raise FileExistsError(f"refusing to overwrite {root}: {strays[0].name} is not part of the previous dataset")
    for q in present:
        q.unlink()
    for d in sorted((q for q in root.rglob("*") if q.is_dir()), key=lambda q: -len(q.parts)):
        if not any(d.iterdir()):
            d.rmdir()
