"""The second pass: one bounded-memory scan with the fitted model, for everything residuals give.

Per block of used rows: residuals e = y − Xb; zᵢ = R11⁻ᵀxᵢ by one triangular solve (BLAS trsm
from the right, Z = X R11⁻¹); leverages hᵢ = ‖zᵢ‖²; the sandwich sums for HC0–HC3; cluster score
sums for one key or two (and their pairs); Breusch–Pagan sums; binned residual sums per feature
and per fitted value; a fitted × residual histogram; the residual sketch (MAE, quantiles) and the
rows with the largest residuals and leverages, with their pass-through id columns.

Memory: a few batches, plus O(clusters × terms) for cluster sums and fixed-size histograms. Bin
grids are set from the first rows (up to ``SAMPLE_ROWS``), which are held until then.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from scipy.linalg.blas import dtrsm

from tallfit.diagnostics.bins import BinnedSums, Grid
from tallfit.diagnostics.heteroskedasticity import BreuschPaganSums
from tallfit.diagnostics.kernels import grid_counts, grid_index
from tallfit.diagnostics.residuals import ResidualSketch, TopRows
from tallfit.kernels.lapack_calls import single_blas_thread
from tallfit.engine.local import DEFAULT_BATCH_ROWS, ProgressHook, design_blocks, span_label
from tallfit.errors import DesignError
from tallfit.results import FitResult
from tallfit.solve.exact import reduce_factor
from tallfit.solve.robust import ClusterSums, SandwichSums



SAMPLE_ROWS = 131_072
HEAT_CELLS = 64  # fitted × residual histogram: 64 × 64 cells over the fitted grid and ±4 s
TOP_K = 10


class KeyCoder:
    """Maps the values of one key column (any Arrow type) to dense codes 0, 1, 2, … as they appear."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.codes: dict[Any, int] = {}

    def encode(self, arr: pa.Array, where: str) -> np.ndarray:
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if arr.null_count:
            raise DesignError(
                f"cluster column {self.name!r} has {arr.null_count} missing value(s) in {where}: every "
                "used row needs a cluster; fill them or drop those rows before fitting"
            )
        if not pa.types.is_dictionary(arr.type):
            arr = pc.dictionary_encode(arr)
        values = arr.dictionary.to_pylist()
        lut = np.fromiter((self.codes.setdefault(v, len(self.codes)) for v in values), np.int64, len(values))
        return lut[arr.indices.to_numpy(zero_copy_only=False)] if len(values) else np.zeros(0, np.int64)

    @property
    def groups(self) -> int:
        return len(self.codes)


class PairCoder:
    """Dense codes for pairs of two codes (the intersection clusters of two-way clustering)."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.codes: dict[int, int] = {}

    def encode(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        key = (a.astype(np.int64) << 32) | b.astype(np.int64)
        uniq, inv = np.unique(key, return_inverse=True)
        lut = np.fromiter((self.codes.setdefault(int(k), len(self.codes)) for k in uniq), np.int64, len(uniq))
        return lut[inv.ravel()]

    @property
    def groups(self) -> int:
        return len(self.codes)


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


class _Pass:
    def __init__(self, model: FitResult, source, cluster: Sequence[str], keep: Sequence[str],
                 diagnostics: bool, top_k: int) -> None:
        spec = model.spec
        names = model.accumulator.names[:-1]  # the fitted design's columns (indicators included)
        self.model, self.source = model, source
        self.cols = [names.index(t) for t in model.terms]
        self.beta = np.asarray(model.inference.estimate, dtype=float)
        Rr = reduce_factor(model.accumulator.R, self.cols)
        p = len(self.cols)
        self.R11 = np.asfortranarray(Rr[:p, :p])
        self.features = [f for f in spec.features if f in model.terms]
        self.fcols = [names.index(f) for f in self.features]
        self.fcols_arr = np.asarray(self.fcols, dtype=np.int64)
        self.intercept = spec.intercept and names[0] in model.terms
        # weighted rows arrive scaled by √w: residuals are then √w·e (the sandwich wants exactly
        # that); binned summaries need the unscaled values, which only an intercept column gives
        self.weighted = bool(getattr(spec, "weights", None))
        if self.weighted and not self.intercept:
            diagnostics = False
        self.cluster = list(cluster)
        self.keep = list(keep)
        self.diagnostics = diagnostics
        s = model.inference.residual_std
        self.out = SecondPass(terms=list(model.terms), features=self.features)
        out = self.out
        out.sandwich = SandwichSums.create(p)
        out.breusch_pagan = BreuschPaganSums.create(p, self.intercept)
        self.coders = [KeyCoder(c) for c in self.cluster]
        if len(self.cluster) == 2:
            self.pairs = PairCoder(f"{self.cluster[0]}×{self.cluster[1]}")
            out.clusters = [ClusterSums(c, p) for c in self.cluster] + [ClusterSums(self.pairs.name, p)]
        else:
            out.clusters = [ClusterSums(c, p) for c in self.cluster]
        if diagnostics:
            out.residuals = ResidualSketch(s)
            out.top_residuals = TopRows(top_k, "absolute residual")
            out.top_leverage = TopRows(top_k, "leverage")
        self.s = out.residuals.scale_sd if diagnostics else s
        self.held: list = []
        self.held_rows = 0
        self.kbuf = np.empty(0, dtype=np.int64)

    # -- the grids, once the sample is in ------------------------------------------------------
    def _set_grids(self, whole: bool) -> None:
        if not self.held:
            F = np.zeros((0, len(self.fcols)))
            fit = np.zeros((0, 1))
        else:
            raw = [b.A / b.A[:, :1] if self.weighted else b.A for b in self.held]
            F = np.concatenate([a[:, self.fcols] for a in raw])
            fit = np.concatenate([a[:, self.cols] @ self.beta for a in raw])[:, None]
        out = self.out
        out.feature_bins = BinnedSums.create(Grid.from_sample(F, whole))
        fgrid = Grid.from_sample(fit, whole)
        out.fitted_bins = BinnedSums.create(fgrid)
        out.heat = np.zeros((HEAT_CELLS + 2, HEAT_CELLS + 2), dtype=np.int64)
        hscale = fgrid.scale[0] * HEAT_CELLS / fgrid.cells
        out.heat_axes = {"fitted_lo": float(fgrid.lo[0]), "fitted_scale": float(hscale),
                         "resid_lo": -4.0 * self.s, "resid_scale": HEAT_CELLS / (8.0 * self.s), "cells": HEAT_CELLS}

    def feed(self, block) -> None:
        out = self.out
        out.n_read += block.n_read
        for k, v in block.dropped_by_column.items():
            out.dropped_by_column[k] = out.dropped_by_column.get(k, 0) + v
        if not self.diagnostics or out.feature_bins is not None:
            self._fold(block)
            return
        self.held.append(block)
        self.held_rows += block.n_used
        if self.held_rows >= SAMPLE_ROWS:
            self.flush(whole=False)

    def flush(self, whole: bool) -> None:
        if self.diagnostics and self.out.feature_bins is None:
            self._set_grids(whole)
        held, self.held = self.held, []
        for b in held:
            self._fold(b)

    def _where(self, block) -> str:
        return span_label(self.source, block.file_index, block.row_start, block.n_read)

    def _fold(self, block) -> None:
        m = block.n_used
        if m == 0:
            return
        out = self.out
        A = block.A
        X = np.asfortranarray(A[:, self.cols])
        y = A[:, -1]
        fitted = X @ self.beta
        e = y - fitted
        Z = dtrsm(1.0, self.R11, X, side=1, lower=0, trans_a=0, overwrite_b=True)  # Z R11 = X
        h = np.einsum("ij,ij->i", Z, Z)
        W = out.sandwich.update(Z, e, h)
        out.breusch_pagan.update(Z, e)
        out.n_used += m
        if self.cluster:
            codes = [c.encode(block.extra[c.name], self._where(block)) for c in self.coders]
            for c, sums, coder in zip(codes, out.clusters, self.coders):
                sums.update(c, W, coder.groups)
            if len(codes) == 2:
                pc_ = self.pairs.encode(codes[0], codes[1])
                out.clusters[2].update(pc_, W, self.pairs.groups)
        if not self.diagnostics:
            return
        if len(self.kbuf) < m:
            self.kbuf = np.empty(max(m, 2 * len(self.kbuf)), dtype=np.int64)
        if self.weighted:  # back to the data's own units; e stays √w·e (a Pearson residual)
            A = A / A[:, :1]
            fitted = A[:, self.cols] @ self.beta
        out.feature_bins.update(A, e, self.fcols_arr, self.kbuf)
        out.fitted_bins.update(fitted[:, None], e, None, self.kbuf)
        ax = out.heat_axes
        a = np.empty(m, dtype=np.int64)
        b = np.empty(m, dtype=np.int64)
        grid_index(fitted, ax["fitted_lo"], ax["fitted_scale"], HEAT_CELLS, a)
        grid_index(e, ax["resid_lo"], ax["resid_scale"], HEAT_CELLS, b)
        grid_counts(a, b, out.heat)
        out.residuals.update(e)
        detail = self._detail(block, e, fitted, h)
        out.top_residuals.update(np.abs(e), detail)
        out.top_leverage.update(h, detail)

    def _detail(self, block, e, fitted, h):
        files = getattr(self.source, "files", [])

        def rows(idx: np.ndarray) -> list[dict[str, Any]]:
            used = np.flatnonzero(block.keep)[idx] if block.keep is not None else idx
            where = str(files[block.file_index].path) if 0 <= block.file_index < len(files) else ""
            base = [{"file": where, "row": int(block.row_start + u), "residual": float(e[i]),
                     "fitted": float(fitted[i]), "leverage": float(h[i])} for i, u in zip(idx, used)]
            take = pa.array(idx)
            for col in self.keep:
                vals = block.extra[col].take(take).to_pylist()
                for d, v in zip(base, vals):
                    d[col] = v if isinstance(v, (int, float, str, bool)) or v is None else str(v)
            return base

        return rows


def second_pass(
    model: FitResult,
    data,
    *,
    cluster: Sequence[str] = (),
    keep: Sequence[str] = (),
    diagnostics: bool = True,
    top_k: int = TOP_K,
    batch_rows: int = DEFAULT_BATCH_ROWS,
    progress: ProgressHook | None = None,
) -> SecondPass:
    """Scan ``data`` once with the fitted ``model`` (see the module note)."""
    from tallfit.inputs import as_source

    if not isinstance(model, FitResult):
        raise DesignError(
            "the second pass checks one model at a time; per-group models are not supported yet "
            "(fit the group of interest with --where instead of --by)"
        )
    if model.spec.absorb:
        raise DesignError(
            f"robust errors and residual checks are not available for a model with an absorbed key "
            f"({model.spec.absorb!r}) yet: its residuals need the level effects; fit without --absorb "
            "to check the model"
        )
    cluster = list(dict.fromkeys(cluster))
    if len(cluster) > 2:
        raise DesignError(f"clustering takes one or two key columns, not {len(cluster)} ({', '.join(cluster)})")
    source = as_source(data)
    run = _Pass(model, source, cluster, keep, diagnostics, top_k)
    extra = list(dict.fromkeys(list(cluster) + list(keep)))
    blocks = design_blocks(source, model.spec, batch_rows, progress, extra_columns=extra, coding=model.coding)
    with single_blas_thread():  # OpenBLAS threads beside the reader were 4-150x slower here
        for block in blocks:
            run.feed(block)
        run.flush(whole=True)
    return run.out
