"""The sums of the second pass for one part of the data: the shared plan (the model's columns,
β, R11⁻¹, the options and the bin grids) and each part's running sums (create / fold / absorb).

Per block of used rows, on row tiles that stay in a core's cache: BLAS products of the tile's
design rows with the plan's tile map give [Z | e] together, zᵢ = R11⁻ᵀxᵢ and e = y − Xβ; one
sweep (kernels.tile_scores) gives the fitted values, the leverages hᵢ = ‖zᵢ‖², the scores and
the Breusch–Pagan sums, and one cross product (kernels.products) the sandwich sums of the chosen
HC estimator (or of all four); cluster score sums for one key or two (and their pairs); binned residual sums per
feature; then per block the fitted-value bins, a fitted × residual histogram, the residual sketch
(MAE, quantiles) and the rows with the largest residuals and leverages, with their pass-through
id columns. With an absorbed key, each row's level adds its row of the level table to [Z | e]
(scaled by √wᵢ when weighted) and wᵢ/W_g to the leverage (engine/absorbed_rows.py).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from tallfit.diagnostics.bins import BinnedSums, Grid
from tallfit.diagnostics.heteroskedasticity import BreuschPaganSums
from tallfit.diagnostics.kernels import (SCORES, SCORES_ALL, gather_add, gather_add_scaled, grid_index, level_tables,
                                         residual_block_sums, tile_scores)
from tallfit.diagnostics.residuals import CELLS as RESIDUAL_CELLS
from tallfit.diagnostics.residuals import ResidualSketch, TopRows
from tallfit.engine.absorbed_rows import ONE_ROW_LEVEL, AbsorbedRows
from tallfit.engine.cluster_codes import KeyCoder, PairCoder
from tallfit.engine.local import span_label
from tallfit.engine.parallel import BufferPool
from tallfit.results import FitResult
from tallfit.solve.exact import reduce_factor, upper_inverse
from tallfit.solve.robust import ClusterSums, SandwichSums

_NO_ROWS = np.zeros(0)
HEAT_CELLS = 64  # fitted × residual histogram: 64 × 64 cells over the fitted grid and ±4 s
TILE_ROWS = 2048  # rows per tile: its A rows, Z and V (≈ 1 MB at p = 21) stay in the core's L2 (same-process A/B over
# 10^7 rows against 4096: CPU 3.81 → 3.62 s, median of 9; the BLAS products run faster on the shorter tile)


@dataclass
class SecondPass:
    """What the pass accumulated (see the module note); the solvers and diagnostics read it."""

    terms: list[str]
    features: list[str]
    n_read: int = 0
    n_used: int = 0
    dropped_by_column: dict[str, int] = field(default_factory=dict)
    sandwich: SandwichSums | None = None
    clusters: list[ClusterSums] = field(default_factory=list)
    breusch_pagan: BreuschPaganSums | None = None
    feature_bins: BinnedSums | None = None
    fitted_bins: BinnedSums | None = None
    heat: np.ndarray | None = None  # (HEAT_CELLS + 2) × (HEAT_CELLS + 2) counts
    heat_axes: dict[str, Any] = field(default_factory=dict)
    residuals: ResidualSketch | None = None
    top_residuals: TopRows | None = None
    top_leverage: TopRows | None = None
    rows_exact: int = 0  # rows of one-row absorbed levels: fitted exactly, left out (absorbed_rows.py)
    levels_used: int = 0  # absorbed levels with a row in the pass: parameters besides the terms


def unscaled(block) -> np.ndarray:
    """A weighted block's rows back in the data's units (they arrive scaled by √w)."""
    return block.A / np.sqrt(block.row_weights)[:, None]


def tile_map(R11_inv: np.ndarray, cols: np.ndarray, beta: np.ndarray, width: int) -> np.ndarray:
    """M (width × (p + 1), Fortran order) with [Z | e] = A M for design rows A of ``width`` columns
    (the design's, then the target): rows ``cols`` hold [R11⁻¹ | −β], the target's row (0, …, 0, 1)."""
    p = len(cols)
    M = np.zeros((width, p + 1), order="F")
    M[np.ix_(cols, np.arange(p))] = R11_inv
    M[cols, p] = -beta
    M[width - 1, p] = 1.0
    return M


class PassPlan:
    """What every part shares: the model's columns, β, R11, the options, and the bin grids."""

    def __init__(self, model: FitResult, cluster: Sequence[str], keep: Sequence[str],
                 diagnostics: bool, top_k: int, robust: str | None = None) -> None:
        spec = model.spec
        names = model.accumulator.names[:-1]  # the fitted design's columns (indicators included)
        self.terms = list(model.terms)
        self.cols = np.asarray([names.index(t) for t in model.terms], dtype=np.int64)
        self.p = len(self.cols)
        self.beta = np.ascontiguousarray(model.inference.estimate, dtype=float)
        Rr = reduce_factor(model.accumulator.R, list(self.cols))
        self.R11 = np.asfortranarray(Rr[: self.p, : self.p])
        # Z = X R11⁻¹ by a product with the inverse, not a triangular solve per tile: one GEMM of
        # the tile's design rows with tile_map gives Z and e at once (measured ≈ 2.5× less time
        # than dtrmm, which runs at a few GFLOP/s on such skinny shapes, plus a column copy).
        # LAPACK's triangular inverse has small componentwise residuals (Du Croz & Higham, IMA J.
        # Numer. Anal. 12, 1992); leverages and sandwiches match statsmodels to 1e-10 / 1e-8
        # (tests/test_robust.py, test_diagnostics.py)
        self.R11_inv = upper_inverse(self.R11)
        self.robust = robust
        self._maps: dict[int, np.ndarray] = {}
        coding = model.coding or {}
        # weighted rows arrive scaled by √w: residuals are then √w·e (the sandwich wants exactly
        # that); binned summaries divide the rows by √w again (the blocks carry each row's w)
        self.weighted = bool(getattr(spec, "weights", None))
        # frequency weights: a row of weight w stands for w equal rows. Each tile's rows of Z are
        # divided by √wᵢ, so ‖zᵢ‖² is the leverage of one of those rows and eᵢ(√wᵢ)·zᵢ the
        # sandwich row whose square is the wᵢ rows' share of the meat; cluster sums take the
        # scores times √wᵢ (wᵢ·eᵢzᵢ, the rows' sum), counts are Σw, the bins weight sums
        self.frequency = self.weighted and getattr(spec, "weight_kind", "analytic") == "frequency"
        # an absorbed key: each row's level adds its row [−x̄_gᵀR11⁻¹ | −α_g] (times √wᵢ when
        # weighted) to [Z | e] by a gather, and wᵢ/W_g to the leverage (engine/absorbed_rows.py)
        self.absorbed = AbsorbedRows(coding["absorbed"], self.R11_inv, self.frequency) if spec.absorb else None
        # categoricals (unweighted): blocks come without indicator columns (level codes instead);
        # [Z | e] is then the product of the dense columns with their rows of the tile map plus,
        # per categorical, the map's row of each row's level (one gather instead of a product
        # over mostly-zero columns: ≈ 5× fewer operations with 58 indicators beside 7 columns)
        self.level_codes = bool(spec.categorical) and not getattr(spec, "weights", None) and "columns" in coding
        self.level_maps: list[np.ndarray] = []
        self.dense = len(names)
        if self.level_codes:
            widths = [len(coding["columns"][c]["columns"]) for c in spec.categorical]
            self.dense = len(names) - sum(widths)
            full = tile_map(self.R11_inv, self.cols, self.beta, len(names) + 1)
            self._maps[self.dense + 1] = np.asfortranarray(np.vstack([full[: self.dense], full[-1:]]))
            self.level_maps = level_tables(full, self.dense, widths)
        self.features = [f for f in spec.features if f in model.terms]
        self.fcols = np.asarray([names.index(f) for f in self.features], dtype=np.int64)
        self.intercept = bool(spec.has_intercept_column and names[0] in model.terms)
        self.diagnostics = diagnostics
        self.cluster, self.keep, self.top_k = list(cluster), list(keep), top_k
        s = model.inference.residual_std
        self.s = ResidualSketch(s).scale_sd if self.diagnostics else s
        self.model_sd = s
        self.feature_grid: Grid | None = None
        self.fitted_grid: Grid | None = None
        self.heat_axes: dict[str, Any] = {}

    def fitted_values(self, block, a: np.ndarray) -> np.ndarray:
        """Xβ of a block's design rows ``a`` (and, with level codes, of its rows' levels)."""
        dense = self.cols < a.shape[1] - 1
        beta = np.zeros(a.shape[1])
        beta[self.cols[dense]] = self.beta[dense]
        out = a @ beta
        for T, codes in zip(self.level_maps, block.codes if self.level_codes else []):
            out -= T[codes + 2, self.p]  # the map's last column holds −β
        if self.absorbed is not None:
            out += self.absorbed.alpha[block.key_codes]
        return out

    def tile_map(self, width: int) -> np.ndarray:
        """``tile_map`` for design rows of ``width`` columns (kept per width)."""
        M = self._maps.get(width)
        if M is None:
            M = self._maps[width] = tile_map(self.R11_inv, self.cols, self.beta, width)
        return M

    @property
    def ready(self) -> bool:
        """Whether the grids are set (or not needed)."""
        return not self.diagnostics or self.feature_grid is not None

    def set_grids(self, held: list, whole: bool) -> None:
        """The bin grids from the sample blocks ``held`` (all the data when ``whole``)."""
        if not held:
            F, fit = np.zeros((0, len(self.fcols))), np.zeros((0, 1))
        else:
            # column-major, so each column's tail points come from one contiguous run (partitioned
            # in place: this copy is the grids' own); column by column, with no fancy-index copies
            F = np.empty((sum(b.A.shape[0] for b in held), len(self.fcols)), order="F")
            fit = np.empty((F.shape[0], 1))
            r = 0
            for b in held:
                a = unscaled(b) if self.weighted else b.A
                rows = slice(r, r + a.shape[0])
                for j, c in enumerate(self.fcols):
                    F[rows, j] = a[:, c]
                fit[rows, 0] = self.fitted_values(b, a)
                r += a.shape[0]
        self.feature_grid = Grid.from_sample(F, whole, overwrite=True)
        self.fitted_grid = fgrid = Grid.from_sample(fit, whole, overwrite=True)
        hscale = fgrid.scale[0] * HEAT_CELLS / fgrid.cells
        self.heat_axes = {"fitted_lo": float(fgrid.lo[0]), "fitted_scale": float(hscale),
                          "resid_lo": -4.0 * self.s, "resid_scale": HEAT_CELLS / (8.0 * self.s),
                          "cells": HEAT_CELLS}


class PartSums:
    """The sums of one part of the data (or of all of it), with create / fold / absorb."""

    def __init__(self, plan: PassPlan, source, pool: BufferPool | None = None) -> None:
        self.plan, self.source, self.pool = plan, source, pool
        p = plan.p
        self.out = out = SecondPass(terms=list(plan.terms), features=list(plan.features))
        out.sandwich = SandwichSums.create(p, plan.robust)
        out.breusch_pagan = BreuschPaganSums.create(p, plan.intercept, centred=plan.absorbed is not None)
        self.coders = [KeyCoder(c) for c in plan.cluster]
        self.pairs = PairCoder(f"{plan.cluster[0]}×{plan.cluster[1]}") if len(plan.cluster) == 2 else None
        out.clusters = [ClusterSums(c, p) for c in plan.cluster]
        if self.pairs is not None:
            out.clusters.append(ClusterSums(self.pairs.name, p))
        if plan.diagnostics:
            out.residuals = ResidualSketch(plan.model_sd)
            out.top_residuals = TopRows(plan.top_k, "absolute residual")
            out.top_leverage = TopRows(plan.top_k, "leverage")
        self._tiles: dict[int, tuple] = {}
        self._levels = np.zeros(len(plan.absorbed.levels) if plan.absorbed is not None else 0, dtype=bool)
        self._vec: tuple | None = None
        # the sandwich rows take the scores' place in the tile unless cluster sums need the scores
        # too (HC2/HC3) or they are 2p wide ("all"); V is then not used
        mode = out.sandwich.mode
        self._in_place = mode == SCORES or (mode != SCORES_ALL and not plan.cluster)

    def _start_bins(self) -> None:
        plan, out = self.plan, self.out
        out.feature_bins = BinnedSums.create(plan.feature_grid)
        out.fitted_bins = BinnedSums.create(plan.fitted_grid)
        out.heat = np.zeros((HEAT_CELLS + 2, HEAT_CELLS + 2), dtype=np.int64)
        out.heat_axes = dict(plan.heat_axes)

    def _tile(self, rows: int) -> tuple[np.ndarray, np.ndarray]:
        """Reused tile buffers (Fortran order): [Z | e] (rows × (p + 1)) and the sandwich rows V."""
        bufs = self._tiles.get(rows)
        if bufs is None:
            if len(self._tiles) >= 4:  # full tiles and a few block ends: keep it bounded
                self._tiles.clear()
            p, mode = self.plan.p, self.out.sandwich.mode
            q = 0 if self._in_place else 2 * p if mode == SCORES_ALL else p
            bufs = self._tiles[rows] = (np.empty((rows, p + 1), order="F"), np.empty((rows, q), order="F"))
        return bufs

    def _rows(self, m: int) -> tuple[np.ndarray, ...]:
        """Reused row vectors of at least m entries: fitted, e, h and two cell-index buffers."""
        if self._vec is None or len(self._vec[0]) < m:
            self._vec = (np.empty(m), np.empty(m), np.empty(m), np.empty(m, dtype=np.int32),
                         np.empty(m, dtype=np.int32))
        return tuple(v[:m] for v in self._vec)

    def release(self) -> None:
        self._tiles.clear()
        self._vec = None

    def fold(self, block) -> None:
        out, plan = self.out, self.plan
        out.n_read += block.n_read
        for k, v in block.dropped_by_column.items():
            out.dropped_by_column[k] = out.dropped_by_column.get(k, 0) + v
        m = block.n_used
        if m == 0:
            return
        if plan.diagnostics and out.feature_bins is None:
            self._start_bins()
        A = block.A
        fitted, e, h, ka, kb = self._rows(m)
        codes = []
        if plan.cluster:
            where = span_label(self.source, block.file_index, block.row_start, block.n_read)
            codes = [c.encode(block.extra[c.name], where) for c in self.coders]
            if self.pairs is not None:
                codes.append(self.pairs.encode(codes[0], codes[1]))
        groups = [c.groups for c in self.coders] + ([self.pairs.groups] if self.pairs is not None else [])
        sandwich, bp, p = out.sandwich, out.breusch_pagan, plan.p
        bin_here = plan.diagnostics and not plan.weighted
        # every step on a tile of rows while it is in cache (measured ≈ 15 % less CPU than sweeping
        # whole blocks step by step: each sweep of a 10 MB block is bound by memory traffic)
        M = plan.tile_map(A.shape[1])
        half = p // 2
        split = int(plan.cols[half - 1]) + 1 if half else 0
        lookup = plan.level_codes
        absorbed = plan.absorbed
        h0 = block.key_share if absorbed is not None else _NO_ROWS
        if absorbed is not None:
            self._levels[block.key_codes] = True
        root_w = np.sqrt(block.row_weights) if absorbed is not None and plan.weighted else None
        freq = plan.frequency
        if freq:  # 1/√wᵢ (0 for rows of weight 0, whose scaled rows are 0) and √wᵢ
            root = np.sqrt(block.row_weights)
            inv_root = np.divide(1.0, root, out=np.zeros(m), where=root > 0)
        y = A[:, A.shape[1] - 1]
        mode = sandwich.mode
        in_place = self._in_place
        for a in range(0, m, TILE_ROWS):
            b = min(a + TILE_ROWS, m)
            ZE, V = self._tile(b - a)
            # [Z | e] by BLAS without the GIL, in two products: Z's first p/2 columns need only the
            # design columns up to cols[p/2 − 1] (R11⁻¹ is upper triangular): ¾ of one dense product
            if lookup:  # the dense columns' product, then each row's level rows of the map
                np.matmul(A[a:b], M, out=ZE)
                for T, c in zip(plan.level_maps, block.codes):
                    gather_add(c, a, T, ZE)
            else:
                np.matmul(A[a:b, :split], M[:split, :half], out=ZE[:, :half])
                np.matmul(A[a:b], M[:, half:], out=ZE[:, half:])
            if root_w is not None:  # centred on the row's level, and its effect taken off e
                gather_add_scaled(block.key_codes, a, absorbed.table, ZE, root_w)
            elif absorbed is not None:
                gather_add(block.key_codes, a, absorbed.table, ZE)
            score_sum = sandwich.score_sum
            if freq:  # Σ wᵢeᵢzᵢ as the fit saw it, then each row of Z as one of its wᵢ rows'
                sandwich.score_sum += ZE[:, :p].T @ ZE[:, p]
                ZE[:, :p] *= inv_root[a:b, None]
                score_sum = np.zeros(p)
            tile_scores(ZE, b - a, a, y, mode, V, e, fitted, h, bp.g, score_sum, not in_place, h0)
            W = ZE[:, :p]  # the scores (or the sandwich rows when in_place)
            sandwich.add_rows(W if in_place else V)
            if freq and codes:  # a row's wᵢ rows add wᵢ·eᵢzᵢ to their cluster
                W = W * root[a:b, None]
            for c, sums, g in zip(codes, out.clusters, groups):
                sums.update(c[a:b], W, g)
        sandwich.add_residuals(e, h, float(block.row_weights.sum()) if freq else None)
        if bin_here:  # per block, column by column (measured ≈ 35 % less time than per tile, whose
            # other buffers pushed the 21 cell tables of 33 KB out of the core's L2)
            known = block.col_min is not None and block.col_max is not None
            out.feature_bins.update(A, e, plan.fcols, ka, ranges=(block.col_min, block.col_max) if known else None)
        if freq:  # the data's own residuals, each standing for wᵢ rows
            e = e * inv_root
        bp.add_squares(e, block.row_weights if freq else None)
        out.n_used += m
        if plan.diagnostics:
            self._diagnose(block, A, e, fitted, h, ka, kb)
        if self.pool is not None:
            self.pool.give(A)

    def _diagnose(self, block, A, e, fitted, h, ka, kb) -> None:
        out, plan = self.out, self.plan
        w = block.row_weights if plan.frequency else None  # counts of rows each row stands for
        if plan.weighted:  # back to the data's own units; e stays √w·e (a Pearson residual) for
            A = unscaled(block)  # analytic weights, and is the plain residual for frequency ones
            fitted = plan.fitted_values(block, A)
            out.feature_bins.update(A, e, plan.fcols, ka, w=w)
        ax = out.heat_axes
        if w is None:  # one sweep: fitted-value bins, heat map, residual sketch
            self._residual_sweep(fitted, e)
        else:
            out.fitted_bins.update(fitted[:, None], e, None, ka, w=w)
            grid_index(fitted, ax["fitted_lo"], ax["fitted_scale"], HEAT_CELLS, ka)
            grid_index(e, ax["resid_lo"], ax["resid_scale"], HEAT_CELLS, kb)
            out.heat = out.heat + np.bincount(ka * (HEAT_CELLS + 2) + kb, weights=w,
                                              minlength=(HEAT_CELLS + 2) ** 2).reshape(out.heat.shape)
            out.residuals.update(e, w)
        detail = self._detail(block, e, fitted, h)
        out.top_residuals.update(np.abs(e), detail)
        out.top_leverage.update(h, detail)

    def _residual_sweep(self, fitted: np.ndarray, e: np.ndarray) -> None:
        """kernels.residual_block_sums into the fitted-value bins, the heat map and the residual
        sketch (the unweighted pass; each has its own update for weighted rows)."""
        out = self.out
        fb, res, ax = out.fitted_bins, out.residuals, out.heat_axes
        g = fb.grid
        franges = np.array([fb.lo_seen[0], fb.hi_seen[0]])
        residual_block_sums(fitted, e, np.array([g.lo[0], g.scale[0], g.cells]), fb.sums[0], franges,
                            np.array([ax["fitted_lo"], ax["fitted_scale"], ax["resid_lo"], ax["resid_scale"],
                                      HEAT_CELLS]), out.heat,
                            np.array([res.lo, 1.0 / res.width, RESIDUAL_CELLS]), res.hist, res.sums)
        fb.lo_seen[0], fb.hi_seen[0] = franges
        res.n += len(e)

    def _detail(self, block, e, fitted, h):
        files = getattr(self.source, "files", [])

        def rows(idx: np.ndarray) -> list[dict[str, Any]]:
            used = np.flatnonzero(block.keep)[idx] if block.keep is not None else idx
            where = str(files[block.file_index].path) if 0 <= block.file_index < len(files) else ""
            base = [{"file": where, "row": int(block.row_start + u), "residual": float(e[i]),
                     "fitted": float(fitted[i]), "leverage": float(h[i])} for i, u in zip(idx, used)]
            take = pa.array(idx)
            for col in self.plan.keep:
                vals = block.extra[col].take(take).to_pylist()
                for d, v in zip(base, vals):
                    d[col] = v if isinstance(v, (int, float, str, bool)) or v is None else str(v)
            return base

        return rows

    def absorb(self, other: "PartSums") -> "PartSums":
        """Add the sums of the part that follows this one in the data."""
        a, b = self.out, other.out
        a.n_read += b.n_read
        a.n_used += b.n_used
        for k, v in b.dropped_by_column.items():
            a.dropped_by_column[k] = a.dropped_by_column.get(k, 0) + v
        a.sandwich = a.sandwich.merge(b.sandwich)
        self._levels |= other._levels
        a.breusch_pagan = a.breusch_pagan.merge(b.breusch_pagan)
        luts = [mine.absorb(theirs) for mine, theirs in zip(self.coders, other.coders)]
        for sums, theirs, lut, coder in zip(a.clusters, b.clusters, luts, self.coders):
            sums.absorb(theirs, lut, coder.groups)
        if self.pairs is not None:
            lut = self.pairs.absorb(other.pairs, luts[0], luts[1])
            a.clusters[2].absorb(b.clusters[2], lut, self.pairs.groups)
        if b.feature_bins is not None:
            if a.feature_bins is None:
                a.feature_bins, a.fitted_bins, a.heat, a.heat_axes = b.feature_bins, b.fitted_bins, b.heat, b.heat_axes
            else:
                a.feature_bins = a.feature_bins.merge(b.feature_bins)
                a.fitted_bins = a.fitted_bins.merge(b.fitted_bins)
                a.heat = a.heat + b.heat
        if a.residuals is not None:
            a.residuals = a.residuals.merge(b.residuals)
            a.top_residuals = a.top_residuals.merge(b.top_residuals)
            a.top_leverage = a.top_leverage.merge(b.top_leverage)
        return self

    def finish(self) -> SecondPass:
        """The sums; grids are set even when no row was used."""
        if self.plan.diagnostics and self.out.feature_bins is None:
            self._start_bins()
        self.release()
        self.out.rows_exact = self.out.dropped_by_column.get(ONE_ROW_LEVEL, 0)
        self.out.levels_used = int(np.count_nonzero(self._levels))
        return self.out
