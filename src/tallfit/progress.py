"""Progress on long scans, as a hook the engine calls once per batch.

The hot loop only adds to counters (the hook); rich's live display redraws from them on its own
thread a few times a second. Off when the output is not a terminal, or when asked.
"""

from __future__ import annotations

import sys
import time


def _parquet_rows(source) -> int | None:
    """Total rows of a Parquet data set from its footers (cheap), else None."""
    if getattr(source, "format", None) != "parquet" or not getattr(source, "files", None):
        return None
    try:
        import pyarrow.parquet as pq

        return sum(pq.ParquetFile(f.path).metadata.num_rows for f in source.files)
    except Exception:  # the scan itself will report an unreadable file properly
        return None


def _human(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


class ScanProgress:
    """Counts rows per pass; shows rows, files done, rate, and time left when the total is known."""

    def __init__(self, source, label: str = "reading", enabled: bool | None = None, stream=None) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = self.stream.isatty() if enabled is None else enabled
        self.source = source
        self.label = label
        self.rows = 0
        self.file_index = 0
        self.total_rows = _parquet_rows(source) if self.enabled else None
        self.sizes = [f.size for f in getattr(source, "files", [])]
        self._progress = None
        self._task = None
        self._start = time.perf_counter()
        self._last = 0.0
        self.passes = 1

    def __call__(self, rows: int, file_index: int) -> None:
        if self.total_rows and self.rows >= self.total_rows:  # a further pass (refinement, report)
            self.passes += 1
            self.rows = 0
            self._start = time.perf_counter()
            if self._progress is not None:
                self._progress.reset(self._task, description=f"{self.label} (pass {self.passes})",
                                     total=self.total_rows)
        self.rows += rows
        self.file_index = file_index
        if self._progress is not None:
            now = time.perf_counter()
            if now - self._last >= 0.2:
                self._last = now
                self._progress.update(self._task, completed=self.rows)
                self.refresh_fields()

    def __enter__(self) -> "ScanProgress":
        if not self.enabled:
            return self
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            Progress,
            TaskProgressColumn,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._progress = Progress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            TaskProgressColumn(),
            TextColumn("{task.completed:,.0f} rows"),
            TextColumn("{task.fields[rate]}"),
            TextColumn("files {task.fields[files]} ({task.fields[bytes]})"),
            TimeElapsedColumn(),
            TimeRemainingColumn(),
            console=Console(file=self.stream),
            transient=True,
            redirect_stdout=False,  # results go to stdout untouched; the bar lives on stderr
            redirect_stderr=False,
        )
        self._task = self._progress.add_task(
            self.label, total=self.total_rows, rate="", files=f"0/{len(self.sizes)}", bytes=""
        )
        self._progress.start()
        return self

    def refresh_fields(self) -> None:
        if self._progress is None:
            return
        elapsed = max(time.perf_counter() - self._start, 1e-9)
        self._progress.update(
            self._task,
            rate=f"{self.rows / elapsed / 1e6:.2f} M rows/s",
            files=f"{min(self.file_index + 1, len(self.sizes))}/{len(self.sizes)}",
            bytes=f"{_human(sum(self.sizes[: max(self.file_index, 0)]))} of {_human(sum(self.sizes))} done",
        )

    def __exit__(self, *exc) -> None:
        if self._progress is not None:
            self._progress.stop()
