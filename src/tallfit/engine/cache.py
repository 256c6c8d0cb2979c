"""Repeated passes over the design [X | y]: streamed from the source, or replayed from a local cache.

Iterative solvers read the data many times, after the fit's own pass has gathered the factor.
:class:`DesignPasses` makes every pass through ``engine.local.design_blocks`` (the same reader,
design and prefetch code as the exact fit). With ``cache=True`` its first pass also appends each
decoded block to one binary file in a spill directory (float64 by default, the blocks' own
column-major layout); later passes map that file into memory and hand out views of it, so CSV is
not parsed and Parquet not decoded again. The cache is never required: if it
cannot be written (no space, no permission) the passes stream from the source as before and the
reason is reported in :attr:`DesignPasses.cache_info`. The file is removed by :meth:`close` (or
when the object is collected, or at interpreter exit).
"""

from __future__ import annotations

import os
import shutil
import tempfile
import weakref
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from tallfit.design.spec import ModelSpec
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, design_blocks
from tallfit.engine.parallel import BufferPool
from tallfit.errors import OutputError

CACHE_DTYPES = {"float64": np.float64, "float32": np.float32}


class DesignCache:
    """An append-only file of design blocks, replayed as memory-mapped column-major views."""

    def __init__(self, k: int | None = None, spill_dir: str | os.PathLike | None = None, dtype: str = "float64") -> None:
        if dtype not in CACHE_DTYPES:
            raise OutputError(f"cache dtype must be one of {', '.join(CACHE_DTYPES)}, not {dtype!r}")
        if spill_dir is not None and not Path(spill_dir).is_dir():
            raise OutputError(f"spill directory {str(spill_dir)!r} does not exist; create it or omit it")
        self.k = k
        self.dtype = np.dtype(CACHE_DTYPES[dtype])
        self.dir = Path(tempfile.mkdtemp(prefix="tallfit-cache-", dir=spill_dir))
        self.path = self.dir / "design.bin"
        self._fh = open(self.path, "wb")
        self._index: list[tuple[int, int]] = []  # (offset in items, rows) per block
        self._items = 0
        self._map: np.memmap | None = None
        self._cleanup = weakref.finalize(self, shutil.rmtree, str(self.dir), True)

    def append(self, A: np.ndarray) -> None:
        """Write one block (m × k) in column-major order."""
        m = A.shape[0]
        if m == 0:
            return
        if self.k is None:
            self.k = A.shape[1]
        if A.shape[1] != self.k:
            raise ValueError(f"block has {A.shape[1]} columns, the cache {self.k}")
        cols = np.ascontiguousarray(A.T, dtype=self.dtype)  # k × m C order = A in column-major order
        self._fh.write(cols.data)
        self._index.append((self._items, m))
        self._items += m * self.k

    def finish(self) -> None:
        self._fh.close()
        if self._items:
            self._map = np.memmap(self.path, dtype=self.dtype, mode="r", shape=(self._items,))

    @property
    def rows(self) -> int:
        return sum(m for _, m in self._index)

    @property
    def nbytes(self) -> int:
        return self._items * self.dtype.itemsize

    @property
    def n_blocks(self) -> int:
        return len(self._index)

    def block(self, i: int) -> np.ndarray:
        """Block i as an m × k float64 Fortran-order array (a view of the map when float64)."""
        off, m = self._index[i]
        view = self._map[off : off + m * self.k].reshape(self.k, m).T
        return view if self.dtype == np.float64 else np.asfortranarray(view, dtype=np.float64)

    def close(self) -> None:
        if not self._fh.closed:
            self._fh.close()
        self._map = None
        self._cleanup()


class DesignPasses:
    """Passes over the used rows of a source as float64 blocks A = [X | y]; counts the passes.

    Every pass streams through ``design_blocks`` with the fitted model's final ``coding`` (so the
    columns are those of the factor), unless the cache is complete. With ``cache=True`` the first
    pass made here writes the cache as it streams (write-through) and later passes replay it; a
    pass abandoned half way leaves no cache behind. Use as a context manager so the file goes.
    """

    def __init__(
        self,
        source,
        spec: ModelSpec,
        batch_rows: int = DEFAULT_BATCH_ROWS,
        progress: ProgressHook | None = None,
        *,
        coding: dict | None = None,
        cache: bool = False,
        spill_dir: str | os.PathLike | None = None,
        cache_dtype: str = "float64",
    ) -> None:
        if cache and spill_dir is not None and not Path(spill_dir).is_dir():
            raise OutputError(f"spill directory {str(spill_dir)!r} does not exist; create it or omit it")
        if cache_dtype not in CACHE_DTYPES:
            raise OutputError(f"cache dtype must be one of {', '.join(CACHE_DTYPES)}, not {cache_dtype!r}")
        self.source, self.spec, self.batch_rows, self.progress = source, spec, int(batch_rows), progress
        self.coding = coding
        self.passes = 0
        self._want_cache = bool(cache)
        self._spill_dir, self._cache_dtype = spill_dir, cache_dtype
        self._cache: DesignCache | None = None
        self._cache_note = "pending" if cache else "not requested"

    def blocks(self, rng: np.random.Generator | None = None) -> Iterator[np.ndarray]:
        """One more pass. From the cache, an ``rng`` puts the blocks in a random order; a stream
        from the source always comes in file order."""
        self.passes += 1
        if self.cached:
            order = range(self._cache.n_blocks) if rng is None else rng.permutation(self._cache.n_blocks)
            for i in order:
                yield self._cache.block(int(i))
            return
        writer = self._open_cache()
        complete = False
        try:
            pool = BufferPool()  # blocks are handed back once the solver has moved on (no page faults per block)
            for block in design_blocks(self.source, self.spec, self.batch_rows, self.progress, coding=self.coding,
                                       pool=pool):
                if not block.n_used:
                    pool.give(block.A)
                    continue
                if writer is not None:
                    try:
                        writer.append(block.A)
                    except OSError as exc:
                        self._drop_cache(f"disabled while writing ({exc.strerror or exc}); streaming from the source")
                        writer = None
                yield block.A
                pool.give(block.A)  # the solver is done with it (solvers never keep a block)
            complete = True
        finally:
            if writer is not None:
                if complete:
                    writer.finish()
                    self._cache_note = "ready"
                else:
                    self._drop_cache("pending")

    @property
    def cached(self) -> bool:
        return self._cache is not None and self._cache_note == "ready"

    @property
    def cache_info(self) -> dict:
        """Where the cache is, how big, and its state ('not requested', 'ready', 'removed', 'disabled: ...')."""
        info: dict = {"status": self._cache_note}
        if self._cache is not None:
            info.update(path=str(self._cache.path), bytes=int(self._cache.nbytes),
                        rows=int(self._cache.rows), dtype=str(self._cache.dtype))
        return info

    # -- cache lifecycle ------------------------------------------------------------------------
    def _open_cache(self) -> DesignCache | None:
        if not self._want_cache or self._cache_note != "pending":
            return None
        try:
            self._cache = DesignCache(None, self._spill_dir, self._cache_dtype)
        except OSError as exc:
            self._cache_note = f"disabled ({exc.strerror or exc}); streaming from the source"
            return None
        return self._cache

    def _drop_cache(self, note: str) -> None:
        if self._cache is not None:
            self._cache.close()
        self._cache = None
        self._cache_note = note

    def close(self) -> None:
        """Remove the cache file and its directory (idempotent)."""
        if self._cache is not None:
            self._cache.close()
            if self._cache_note == "ready":
                self._cache_note = "removed"

    def __enter__(self) -> "DesignPasses":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
