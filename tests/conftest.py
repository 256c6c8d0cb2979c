"""Shared fixtures and helpers for the test suite."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest


def table_of(columns: dict[str, np.ndarray]) -> pa.Table:
    return pa.table({k: pa.array(np.asarray(v)) for k, v in columns.items()})


def rel_close(a, b, rtol: float) -> bool:
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    return bool(np.all(np.abs(a - b) <= rtol * np.maximum(np.abs(b), 1e-300)))


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
