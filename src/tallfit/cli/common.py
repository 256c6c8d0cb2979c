"""Pieces shared by the command modules: option groups, argument parsing helpers, progress."""

from __future__ import annotations

import argparse

from tallfit.errors import DesignError


def split_list(value: str) -> list[str]:
    """'a, b,c' → ['a', 'b', 'c']."""
    return [v.strip() for v in value.split(",") if v.strip()]


def add_data_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("data", nargs="+", help="files, directories or glob patterns (Parquet, CSV, JSON lines, Arrow IPC)")
    p.add_argument("--format", choices=["parquet", "csv", "jsonl", "ipc"], help="input format (default: from the file names)")
    p.add_argument("--delimiter", default=",", help="CSV field delimiter (default ','; 'tab' or '\\t' for tab)")
    p.add_argument("--batch-rows", type=int, default=65_536, metavar="N", help="rows per batch read (default 65536)")
    p.add_argument("--no-progress", action="store_true", help="do not show progress on the terminal")


def open_data(args):
    """The Source named by the data options."""
    from tallfit.inputs import as_source

    delimiter = "\t" if args.delimiter in ("\\t", "tab", "TAB") else args.delimiter
    data = args.data[0] if len(args.data) == 1 else args.data
    return as_source(data, format=args.format, delimiter=delimiter)


def progress_for(args, source, label: str = "reading"):
    """A progress display for one command (off with --no-progress or when not a terminal)."""
    from tallfit.progress import ScanProgress

    enabled = False if getattr(args, "no_progress", False) else None
    return ScanProgress(source, label=label, enabled=enabled)


def _pairs(values: list[str], what: str) -> dict[str, str]:
    out = {}
    for v in values:
        key, sep, val = v.partition("=")
        if not sep or not key.strip():
            raise DesignError(f"{what} expects COLUMN=VALUE, got {v!r}")
        out[key.strip()] = val.strip()
    return out


def _merges(values: list[str]) -> dict[str, dict[str, list[str]]]:
    out: dict[str, dict[str, list[str]]] = {}
    for v in values:
        col, sep, rest = v.partition(":")
        new, sep2, olds = rest.partition("=")
        levels = [o.strip() for o in olds.split("+") if o.strip()]
        if not (sep and sep2 and col.strip() and new.strip() and levels):
            raise DesignError(f"--merge-levels expects COLUMN:NEW=OLD+OLD, got {v!r}")
        out.setdefault(col.strip(), {})[new.strip()] = levels
    return out


def _drops(values: list[str]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for v in values:
        col, sep, rest = v.partition("=")
        levels = [lv.strip() for lv in rest.split("+") if lv.strip()]
        if not (sep and col.strip() and levels):
            raise DesignError(f"--drop-level expects COLUMN=LEVEL or COLUMN=LEVEL+LEVEL, got {v!r}")
        out.setdefault(col.strip(), []).extend(levels)
    return out


def add_design_options(p: argparse.ArgumentParser) -> None:
    """Options that shape the design matrix (shared by every command that fits)."""
    g = p.add_argument_group("design terms")
    g.add_argument("--categorical", type=split_list, default=[], metavar="COLS", help="columns entered as indicator columns (levels found while reading)")
    g.add_argument("--reference", action="append", default=[], metavar="COL=LEVEL", help="reference level of a categorical column (default: its most frequent level)")
    g.add_argument("--min-level-rows", type=int, default=None, metavar="N", help="merge levels with fewer rows than N into one '(other)' level")
    g.add_argument("--max-levels", type=int, default=None, metavar="K", help="keep the K most frequent levels of each categorical column, merge the rest")
    g.add_argument("--merge-levels", action="append", default=[], metavar="COL:NEW=OLD+OLD", help="merge named levels of a categorical column into one, e.g. 'region:north=north-1+north-2' (repeatable)")
    g.add_argument("--drop-level", action="append", default=[], metavar="COL=LEVEL[+LEVEL]", help="drop the indicator column of named levels after the pass, so their rows count as the reference level, e.g. 'region=east-3' (repeatable)")
    g.add_argument("--derive", action="append", default=[], metavar="'NAME = EXPR'", help="a derived feature as an SQL expression, e.g. 'log_iops = ln(disk_iops + 1)' (repeatable)")
    g.add_argument("--interactions", type=split_list, default=[], metavar="COLS", help="add all pairwise products of these columns as features")
    g.add_argument("--poly", action="append", default=[], metavar="COL=DEGREE", help="add powers 2..DEGREE of a column as features (repeatable)")
    g.add_argument("--where", default=None, metavar="EXPR", help="SQL condition selecting the rows to use, e.g. \"region = 'north-1' AND cpu_util > 0.05\"")
    g.add_argument("--weights", default=None, metavar="COL", help="weight column (rows scaled by √w)")
    g.add_argument("--weight-kind", choices=["analytic", "frequency"], default="analytic", help="analytic: precision weights, each row one observation (default); frequency: a row of weight w counts as w rows")
    g.add_argument("--absorb", default=None, metavar="COL", help="sweep out a high-cardinality key (a host id) as fixed effects, without one column per level")
    g.add_argument("--by", type=split_list, default=[], metavar="COLS", help="one model per value of these columns, all from one pass")
    g.add_argument("--missing", action="append", default=[], metavar="COL=POLICY", help="missing-value policy per column (or '*'): drop (default), fail, fill:VALUE, indicator[:VALUE] (repeatable)")


def design_kwargs(args) -> dict:
    """Keyword arguments of tallfit.api.fit from the design options."""
    poly = {}
    for col, deg in _pairs(args.poly, "--poly").items():
        try:
            poly[col] = int(deg)
        except ValueError:
            raise DesignError(f"--poly {col}={deg}: the degree must be a whole number") from None
    out = {
        "categorical": args.categorical,
        "reference": _pairs(args.reference, "--reference") or None,
        "min_level_count": args.min_level_rows,
        "max_levels": args.max_levels,
        "merge_levels": _merges(args.merge_levels) or None,
        "derive": args.derive,
        "interactions": args.interactions,
        "polynomials": poly or None,
        "where": args.where,
        "weights": args.weights,
        "weight_kind": args.weight_kind,
        "missing": _pairs(args.missing, "--missing") or None,
        "absorb": args.absorb,
        "by": args.by,
    }
    drops = _drops(getattr(args, "drop_level", []))
    if drops:
        out["drop_levels"] = drops
    return out


def add_scheduler_option(p) -> None:
    """--scheduler: the passes over parts on a dask.distributed cluster (engine/cluster.py)."""
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run the passes on a dask.distributed cluster: its scheduler's address (tcp://host:8786), "
                   "or 'local' for one worker process per core here; the workers read the files themselves")
