"""Pieces shared by the command modules: option groups, argument parsing helpers, progress."""

from __future__ import annotations

import argparse


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
