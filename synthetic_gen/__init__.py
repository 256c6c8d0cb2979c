"""Synthetic server-fleet power telemetry for tallfit demos, tests and benchmarks.

One row is one host's one-minute sample; ``power_w`` is linear in the numeric telemetry with
known coefficients (``TRUE_COEFFICIENTS``) plus Gaussian noise, and options add documented terms.
"""

from __future__ import annotations

from .generator import DEFAULT_CHUNK_ROWS, generate, generate_table, truth
from .scenario import FEATURES, NOISE_SD, TARGET, TRUE_COEFFICIENTS

__all__ = [
    "DEFAULT_CHUNK_ROWS",
    "FEATURES",
    "NOISE_SD",
    "TARGET",
    "TRUE_COEFFICIENTS",
    "generate",
    "generate_table",
    "truth",
]
