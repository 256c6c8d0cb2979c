"""Progress display: drawn on a terminal, silent otherwise, never in the way of the result."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import tallfit
from tallfit.inputs import as_source
from tallfit.progress import ScanProgress


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def _data(tmp_path):
    rng = np.random.default_rng(0)
    for i in range(3):
        x = rng.normal(size=5000)
        pq.write_table(pa.table({"x": x, "y": 2 * x + rng.normal(size=5000)}), tmp_path / f"p{i}.parquet")
    return as_source(str(tmp_path))


def test_progress_on_a_terminal_counts_every_row(tmp_path):
    src = _data(tmp_path)
    term = _Terminal()
    with ScanProgress(src, stream=term) as prog:
        prog._last = -1.0
        model = tallfit.fit(src, "y", ["x"], batch_rows=700, progress=prog)
        prog.refresh_fields()
    assert prog.rows == 15_000 == model.inference.n_used
    assert prog.total_rows == 15_000  # from the Parquet footers
    assert prog.enabled


def test_progress_is_off_when_not_a_terminal(tmp_path):
    src = _data(tmp_path)
    out = io.StringIO()
    with ScanProgress(src, stream=out) as prog:
        tallfit.fit(src, "y", ["x"], progress=prog)
    assert not prog.enabled and out.getvalue() == ""
    assert prog.rows == 15_000


def test_a_second_pass_starts_a_new_count(tmp_path):
    src = _data(tmp_path)
    with ScanProgress(src, stream=_Terminal()) as prog:
        for _ in range(2):
            for chunk in src.batches(["x", "y"], 5000):
                prog(chunk.batch.num_rows, chunk.file_index)
    assert prog.passes == 2 and prog.rows == 15_000
