"""Rows of a model with an absorbed key in the second pass: each row's level, effect and centring.

With a key swept out (accumulate/absorb.py) the model is yᵢ = α_g + xᵢᵀβ + eᵢ, and by
Frisch–Waugh–Lovell its design is the rows centred on their level's means, x̃ᵢ = xᵢ − x̄_g. In the
pass's coordinates zᵢ = R11⁻ᵀx̃ᵢ = R11⁻ᵀxᵢ − R11⁻ᵀx̄_g and eᵢ = yᵢ − xᵢᵀβ − α_g: one gathered row
per data row, [−x̄_gᵀR11⁻¹ | −α_g], added to the tile's [Z | e] (kernels.gather_add) as for
categorical levels. The hat matrix of the fit with one indicator per level is the levels'
averaging plus that of the centred design, so the leverage is 1/n_g + ‖zᵢ‖² (wᵢ/W_g + ‖zᵢ‖² for
analytic weights, whose rows arrive scaled by √wᵢ and get their level's row scaled alike), and the
sandwich of the centred rows is the slopes' block of the explicit-dummy sandwich: HC0–HC3 and
clustered errors equal that fit's, with k = p + (levels) in the small-sample factors.

Rows the pass cannot use are left out and counted: a level the model never saw (its effect is
unknown; only on other data) and a level of one row, which the fit matches exactly (eᵢ = 0,
hᵢ = 1, found as wᵢ/W_g = 1; with frequency weights, 1/W_g = 1, a level of one row of
weight 1): such a row adds nothing to any sandwich and leaves n − k unchanged,
since its level is one parameter less (the common practice of dropping singleton levels).
"""

from __future__ import annotations

import threading

import numpy as np
import pyarrow as pa

from tallfit.design.categorical import level_seed, seeded_coder
from tallfit.engine.local import span_label

UNSEEN_LEVEL = "(level not in the model)"
ONE_ROW_LEVEL = "(level of one row)"
ALONE = 1.0 - 1e-9  # a row's share wᵢ/W_g of its level from which it is the level's only row


class AbsorbedRows:
    """The model's absorbed levels: their effects, a level coder for any key column, and (given
    R11⁻¹) the level table and leverage shares of the second pass and of intervals."""

    def __init__(self, absorbed: dict, R11_inv: np.ndarray | None = None, frequency: bool = False) -> None:
        self.frequency = frequency  # weights count rows: a row's share is that of one of its w rows
        self.column = absorbed["column"]
        self.levels = list(absorbed["effects"])
        G = len(self.levels)
        self.alpha = alpha = np.fromiter(absorbed["effects"].values(), dtype=float, count=G)
        self._seeds: dict[str, pa.Array | None] = {}
        self._lock = threading.Lock()
        if R11_inv is None:  # effects only (scoring without intervals; older model files)
            return
        p = R11_inv.shape[0]
        sizes = np.asarray(absorbed["sizes"], dtype=float)  # rows, or weight sums when weighted
        means = np.asarray(absorbed["means"], dtype=float).reshape(G, p)
        self.inv_size = 1.0 / sizes
        # rows 0, 1 for the codes −2 and −1 (never used here), as kernels.level_tables lays out
        self.table = np.zeros((G + 2, p + 1), order="F")
        self.table[2:, :p] = -(means @ R11_inv)
        self.table[2:, p] = -alpha

    def __getstate__(self) -> dict:  # sent to cluster workers with the pass's plan
        state = dict(self.__dict__)
        del state["_lock"]
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def coder(self, key_type: pa.DataType):
        """A fresh level coder whose ids below len(levels) are the model's levels (one per stream
        or per scorer: coders are not shared between threads)."""
        return seeded_coder(self.column, self._seed(key_type))

    def _seed(self, key_type: pa.DataType) -> pa.Array | None:
        kind = "int" if pa.types.is_integer(key_type) and not pa.types.is_uint64(key_type) else "str"
        with self._lock:
            if kind not in self._seeds:
                self._seeds[kind] = level_seed(self.levels, key_type)
            return self._seeds[kind]

    def coded(self, blocks, source):
        """The blocks of one stream with ``key_codes`` (the row's level id) and ``key_share``
        (wᵢ/W_g, its leverage from the level) set, the rows of unseen and one-row levels left out
        and counted; one level coder per stream (no shared state)."""
        coder = None
        G = len(self.levels)
        for block in blocks:
            keys = block.extra[self.column]
            if coder is None:
                coder = self.coder(keys.type)
            where = span_label(source, block.file_index, block.row_start, block.n_read)
            codes = coder.codes(keys, where)
            known = (codes >= 0) & (codes < G)
            share = np.zeros(len(codes))
            share[known] = self.inv_size[codes[known]]
            if block.row_weights is not None and not self.frequency:
                share *= block.row_weights
            ok = known & (share < ALONE)
            if not ok.all():
                null = int(np.count_nonzero(codes == -2))  # no key value: dropped as in the fit
                _leave_out(block, ok, {self.column: null, UNSEEN_LEVEL: int(np.count_nonzero(~known)) - null,
                                       ONE_ROW_LEVEL: int(np.count_nonzero(known & ~ok))})
                codes, share = codes[ok], share[ok]
            block.key_codes = np.ascontiguousarray(codes, dtype=np.int64)
            block.key_share = share
            yield block


def _leave_out(block, ok: np.ndarray, counts: dict[str, int]) -> None:
    """Keep only the rows ``ok`` of a block's used rows; count the others by reason."""
    idx = np.flatnonzero(ok)
    used = np.flatnonzero(block.keep) if block.keep is not None else np.arange(block.A.shape[0])
    keep = np.zeros(block.A.shape[0] if block.keep is None else block.keep.shape[0], dtype=bool)
    keep[used[idx]] = True
    part = block.subset(idx)
    block.keep = keep
    block.A, block.extra, block.codes, block.row_weights = part.A, part.extra, part.codes, part.row_weights
    block.col_min = block.col_max = None  # the ranges of rows no longer all here
    for reason, n in counts.items():
        if n:
            block.dropped_by_column[reason] = block.dropped_by_column.get(reason, 0) + n
