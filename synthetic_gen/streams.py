"""Block-seeded random streams: every drawn value depends only on (seed, stream, row).

Rows are grouped into fixed blocks of ``BLOCK_ROWS``. Block ``b`` of stream ``s`` is drawn from
``Generator(PCG64(SeedSequence(seed, spawn_key=(s, b))))`` -- the grandchild ``spawn()[s].spawn()[b]``
of ``SeedSequence(seed)`` -- so any row range can be produced, in any chunking, with the same values.
"""

from __future__ import annotations

import numpy as np

BLOCK_ROWS = 32_768

# Stream ids (first element of the spawn key). 0 is reserved for the host table.
HOSTS = 0
FEATURES = 1
NOISE = 2
MISSING = 3
OUTLIERS = 4
EXTRAS = 5


def generator(seed: int, *key: int) -> np.random.Generator:
    """A PCG64 generator for the spawn key ``key`` under ``seed``."""
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


class BlockDraws:
    """Draws ``k`` standard-normal or uniform rows for any row range ``[start, stop)``."""

    def __init__(self, seed: int) -> None:
        self._seed = seed
        # One partial block per (stream, kind, k): consecutive chunks share their boundary block.
        self._partial: dict[tuple[int, str, int], tuple[int, np.ndarray]] = {}

    def normal(self, stream: int, k: int, start: int, stop: int) -> np.ndarray:
        """Standard normals, shape ``(k, stop - start)``."""
        return self._draw(stream, "normal", k, start, stop)

    def uniform(self, stream: int, k: int, start: int, stop: int) -> np.ndarray:
        """Uniforms on [0, 1), shape ``(k, stop - start)``."""
        return self._draw(stream, "uniform", k, start, stop)

    def _fill(self, stream: int, kind: str, block: int, rows: np.ndarray) -> None:
        g = generator(self._seed, stream, block)
        fill = g.standard_normal if kind == "normal" else g.random
        for row in rows:  # row-major: variable j takes the j-th run of BLOCK_ROWS draws
            fill(out=row)

    def _draw(self, stream: int, kind: str, k: int, start: int, stop: int) -> np.ndarray:
        out = np.empty((k, stop - start), dtype=np.float64)
        key = (stream, kind, k)
        for block in range(start // BLOCK_ROWS, (stop - 1) // BLOCK_ROWS + 1):
            base = block * BLOCK_ROWS
            lo, hi = max(start, base), min(stop, base + BLOCK_ROWS)
            if lo == base and hi == base + BLOCK_ROWS:
                self._fill(stream, kind, block, out[:, lo - start : hi - start])
                continue
            cached = self._partial.get(key)
            if cached is None or cached[0] != block:
                full = np.empty((k, BLOCK_ROWS), dtype=np.float64)
                self._fill(stream, kind, block, full)
                self._partial[key] = cached = (block, full)
            out[:, lo - start : hi - start] = cached[1][:, lo - base : hi - base]
        return out
