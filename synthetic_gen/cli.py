"""Command line: python -m synthetic_gen OUT --rows N [options]."""

from __future__ import annotations

import argparse
import math
import sys
import time

from .generator import DEFAULT_CHUNK_ROWS, generate
from .layout import BY_DAY_LAYOUTS, FILE_SUFFIXES
from .writers import FORMATS


def _whole(text: str, minimum: int) -> int:
    digits = text.replace("_", "")
    try:
        value = int(digits) if digits.lstrip("-").isdigit() else float(digits)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not math.isfinite(value) or value != int(value) or value < minimum:
        raise argparse.ArgumentTypeError(f"must be a whole number >= {minimum}: {text!r}")
    return int(value)


def _count(text: str) -> int:
    """A positive count: 20000000, 20_000_000 or 2e7."""
    return _whole(text, 1)


def _nonnegative(text: str) -> int:
    return _whole(text, 0)


def _fraction(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not 0.0 <= value < 1.0:
        raise argparse.ArgumentTypeError(f"must be a fraction in [0, 1): {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m synthetic_gen",
        description="Write synthetic server-fleet power telemetry with a known linear model, plus truth.json.",
    )
    p.add_argument("out", help="output directory, or a single file ending in .parquet, .csv or .jsonl")
    p.add_argument("--rows", type=_count, required=True, help="number of rows (e.g. 1000000 or 2e7)")
    p.add_argument("--seed", type=_nonnegative, default=0, help="random seed (default 0)")
    p.add_argument("--format", dest="fmt", choices=FORMATS, default=None,
                   help="parquet (zstd, default), parquet-plain (uncompressed), csv or jsonl; "
                        "inferred from a file suffix if omitted")
    p.add_argument("--files", type=_count, default=1, help="split into this many files (per day with --by-day)")
    p.add_argument("--by-day", nargs="?", const="hive", choices=BY_DAY_LAYOUTS, default=None,
                   help="one file per day: hive directories day=YYYY-MM-DD/ (default) or flat YYYY-MM-DD files")
    p.add_argument("--chunk-rows", type=_count, default=DEFAULT_CHUNK_ROWS,
                   help=f"rows held in memory at once (default {DEFAULT_CHUNK_ROWS}); lower it for wide data")
    p.add_argument("--hosts", type=_count, default=2000, help="fleet size (default 2000)")
    g = p.add_argument_group("model options")
    g.add_argument("--class-effects", action="store_true", help="add power offsets per machine_class and region")
    g.add_argument("--correlated", action="store_true", help="load features share one latent factor")
    g.add_argument("--missing", type=_fraction, default=0.0, metavar="FRAC", help="null rate per feature cell")
    g.add_argument("--heteroskedastic", action="store_true", help="noise sd grows with cpu_util")
    g.add_argument("--outliers", type=_fraction, default=0.0, metavar="FRAC", help="fraction of rows with power spikes")
    g.add_argument("--host-effects", action="store_true", help="add a per-host random power offset")
    g.add_argument("--quadratic", action="store_true", help="add curvature in inlet_temp_c")
    g.add_argument("--extra-features", type=_nonnegative, default=0, metavar="K",
                   help="add K standard-normal columns x01..xK with known coefficients")
    p.add_argument("--overwrite", action="store_true", help="replace a previous generated dataset at OUT")
    p.add_argument("-q", "--quiet", action="store_true", help="print nothing on success")
    return p


def _format_for(out: str, fmt: str | None) -> str:
    if fmt is not None:
        return fmt
    for suffix, formats in FILE_SUFFIXES.items():
        if out.lower().endswith(suffix):
            return "parquet" if "parquet" in formats else next(iter(formats))
    return "parquet"


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    fmt = _format_for(args.out, args.fmt)
    began = time.perf_counter()
    try:
        info = generate(
            args.out, args.rows, seed=args.seed, fmt=fmt, files=args.files, by_day=args.by_day or False,
            chunk_rows=args.chunk_rows, class_effects=args.class_effects, correlated=args.correlated,
            missing=args.missing, heteroskedastic=args.heteroskedastic, outliers=args.outliers,
            host_effects=args.host_effects, quadratic=args.quadratic, extra_features=args.extra_features,
            hosts=args.hosts, overwrite=args.overwrite,
        )
    except (ValueError, TypeError, OSError) as exc:
        print(f"synthetic_gen: error: {exc}", file=sys.stderr)
        return 1
    if not args.quiet:
        seconds = time.perf_counter() - began
        print(f"wrote {info['rows']:,} rows in {len(info['files'])} {fmt} file(s) to {args.out} "
              f"in {seconds:.1f} s ({info['rows'] / seconds:,.0f} rows/s)")
    return 0
