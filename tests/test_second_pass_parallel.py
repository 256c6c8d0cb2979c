"""The second pass over a data set of several parts: worker-count invariance and agreement with one
ordered scan (property tests on invented server telemetry), and its kernels against numpy.

* Any number of workers gives the same sums bit for bit (parts are merged in part order by a tree
  whose shape depends only on the number of parts).
* The parts' merged sums equal those of one ordered scan of the same rows to rounding, with the
  same bin grids (set from the same first rows), the same cluster numbering and the same top rows.
* ``tile_scores`` on [Z | e] from the plan's tile map against plain numpy / scipy solve_triangular.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.linalg import solve_triangular

import tallfit
from tallfit.diagnostics.assemble import build_diagnostics
from tallfit.diagnostics.kernels import (
    SCORES, SCORES_ALL, SCORES_HC2, SCORES_HC3, tile_scores, tile_scores_reference,
)
from tallfit.diagnostics.residuals import TopRows
from tallfit.engine.pass_sums import tile_map
from tallfit.engine.second_pass import SAMPLE_ROWS, second_pass
from tallfit.errors import DesignError
from tallfit.solve.robust import robust_for_model

FILES, ROWS, BATCH = 5, 30_000, 6_000  # 150,000 rows: the grid sample (131,072) spans five files
FEATURES = ["cpu_util", "inlet_temp_c"]


def _fleet(seed: int = 3) -> pa.Table:
    rng = np.random.default_rng(seed)
    n = FILES * ROWS
    cpu = rng.uniform(0, 1, n)
    temp = rng.normal(24, 3, n)
    host = rng.integers(0, 400, n)
    power = 180 + 120 * cpu + 2.5 * temp + rng.normal(0, 4 + 10 * cpu, n)
    return pa.table({"cpu_util": cpu, "inlet_temp_c": temp, "power_w": power,
                     "host_id": pa.array([f"h{h:03d}" for h in host]),
                     "rack": pa.array([f"r{h // 40}" for h in host])})


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    table = _fleet()
    folder = tmp_path_factory.mktemp("fleet")
    for i in range(FILES):
        pq.write_table(table.slice(i * ROWS, ROWS), folder / f"part{i}.parquet", row_group_size=ROWS)
    model = tallfit.fit(table, target="power_w", features=FEATURES)
    return table, str(folder), model


def _run(model, data, workers=None):
    return second_pass(model, data, cluster=["host_id", "rack"], keep=["host_id"], top_k=7, robust="all",
                       batch_rows=BATCH, workers=workers)


def _arrays(sp) -> dict[str, np.ndarray]:
    out = {"gram": sp.sandwich.gram, "score_sum": sp.sandwich.score_sum, "bp_g": sp.breusch_pagan.g,
           "bp": np.array([sp.breusch_pagan.n, sp.breusch_pagan.mean, sp.breusch_pagan.m2]),
           "features": sp.feature_bins.sums, "fitted": sp.fitted_bins.sums, "heat": sp.heat,
           "hist": sp.residuals.hist, "moments": sp.residuals.sums,
           "top": sp.top_residuals.values, "lev": sp.top_leverage.values}
    for c in sp.clusters:
        out["cluster " + c.name] = c.S[: c.groups]
    return out


def test_any_worker_count_gives_identical_sums(fleet):
    _, folder, model = fleet
    one = _run(model, folder, workers=1)
    assert one.n_used == FILES * ROWS
    for w in (2, 3):
        other = _run(model, folder, workers=w)
        for name, a in _arrays(one).items():
            np.testing.assert_array_equal(a, _arrays(other)[name], err_msg=name)
        assert other.top_residuals.rows == one.top_residuals.rows


def test_parts_equal_one_ordered_scan(fleet):
    table, folder, model = fleet
    assert FILES * ROWS > SAMPLE_ROWS > (FILES - 1) * ROWS  # the sample ends inside the last file
    serial = _run(model, table)  # an in-memory table is one ordered stream
    parts = _run(model, folder, workers=2)
    a, b = _arrays(serial), _arrays(parts)
    assert a.keys() == b.keys()
    # Σ zᵢeᵢ is rounding noise around 0 on the fitting data: both only need to be that small
    assert max(serial.sandwich.normal_equations_residual(), parts.sandwich.normal_equations_residual()) < 1e-12
    for name in set(a) - {"score_sum"}:
        np.testing.assert_allclose(b[name], a[name], rtol=1e-10, atol=1e-9 * np.abs(a[name]).max(), err_msg=name)
    np.testing.assert_array_equal(parts.feature_bins.grid.lo, serial.feature_bins.grid.lo)
    assert [c.groups for c in parts.clusters] == [c.groups for c in serial.clusters] == [400, 10, 400]
    # rows are counted within their file
    rows = [(int(r["file"][-9]) * ROWS + r["row"], r["host_id"]) for r in parts.top_residuals.rows]
    assert rows == [(r["row"], r["host_id"]) for r in serial.top_residuals.rows]
    ra = robust_for_model(model, serial.sandwich, serial.clusters, None)
    rb = robust_for_model(model, parts.sandwich, parts.clusters, None)
    for kind in ("HC0", "HC2", "HC3", "cluster:host_id+rack"):
        np.testing.assert_allclose(rb["estimators"][kind]["covariance"], ra["estimators"][kind]["covariance"],
                                   rtol=1e-10, err_msg=kind)
    da, db = build_diagnostics(model, serial), build_diagnostics(model, parts)
    for fa, fb in zip(da["features"], db["features"]):
        assert fa["bins"]["count"] == fb["bins"]["count"]


def test_a_missing_cluster_key_names_its_file(tmp_path, fleet):
    table, _, model = fleet
    for i in range(2):
        part = table.slice(i * 1000, 1000)
        if i == 1:
            host = part.column("host_id").to_pylist()
            host[10] = None
            part = part.set_column(part.schema.get_field_index("host_id"), "host_id", pa.array(host))
        pq.write_table(part, tmp_path / f"p{i}.parquet")
    with pytest.raises(DesignError, match=r"cluster column 'host_id' has 1 missing value\(s\) in .*p1\.parquet, rows 0-999"):
        second_pass(model, str(tmp_path), cluster=["host_id"], diagnostics=False, workers=2)


def test_top_rows_merge_equals_one_update():
    rng = np.random.default_rng(4)
    score = np.round(rng.normal(size=300), 1)  # ties: the earlier row must win, as in one pass
    rows = [{"row": i} for i in range(300)]
    whole = TopRows(9, "x")
    whole.update(score, lambda idx: [rows[i] for i in idx])
    a, b = TopRows(9, "x"), TopRows(9, "x")
    a.update(score[:170], lambda idx: [rows[i] for i in idx])
    b.update(score[170:], lambda idx: [rows[170 + i] for i in idx])
    merged = a.merge(b)
    assert merged.rows == whole.rows
    np.testing.assert_array_equal(merged.values, whole.values)


@pytest.mark.parametrize("mode", [SCORES, SCORES_HC2, SCORES_HC3, SCORES_ALL])
def test_tile_product_and_score_kernel_match_numpy(mode):
    rng = np.random.default_rng(8)
    m, p, k = 777, 5, 7  # 7 design columns, of which the model keeps 5 (cols), then the target
    R = np.asfortranarray(np.triu(rng.normal(size=(p, p))) + 3 * np.eye(p))
    A = np.asfortranarray(rng.normal(size=(m, k + 1)))
    cols = np.array([0, 2, 3, 5, 6])
    beta = rng.normal(size=p)
    M = tile_map(np.asfortranarray(np.triu(np.linalg.inv(R))), cols, beta, k + 1)
    ZE = np.asfortranarray(A[100:] @ M)
    X = A[100:, cols]
    np.testing.assert_allclose(ZE[:, :p], solve_triangular(R, X.T, trans="T").T, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(ZE[:, p], A[100:, k] - X @ beta, rtol=1e-12, atol=1e-13)
    ZE[:, :p] /= 30.0
    ZE[3, :p] = 0.0
    ZE[3, 0] = 1.0  # a row of leverage 1: ∞ in the HC2/HC3 rows, as the reference says
    Z, ee = ZE[:, :p].copy(), ZE[:, p].copy()
    Vr, hr, Wr, sr, gr = tile_scores_reference(Z, ee, mode)
    # the tile is rows 100.. of the block: e, fitted and h are indexed like the block's rows
    n = m - 100
    V = np.empty((n, Vr.shape[1] if mode != SCORES else 0), order="F")
    e, fitted, h = np.full(m, np.nan), np.full(m, np.nan), np.full(m, np.nan)
    g, s = np.zeros(p), np.zeros(p)
    y = np.asfortranarray(A)[:, k]
    ZE2, ZE3 = ZE.copy(order="F"), ZE.copy(order="F")
    tile_scores(ZE, n, 100, y, mode, V, e, fitted, h, g, s, True, np.zeros(0))
    assert np.isnan(e[:100]).all() and np.isnan(h[:100]).all()
    np.testing.assert_array_equal(e[100:], ee)
    np.testing.assert_allclose(fitted[100:], y[100:] - ee, rtol=1e-15)
    np.testing.assert_allclose(h[100:], hr, rtol=1e-14)
    np.testing.assert_allclose(ZE[:, :p], Wr, rtol=1e-15)  # the scores, in place
    if mode != SCORES:
        finite = np.isfinite(Vr)
        np.testing.assert_allclose(V[finite], Vr[finite], rtol=1e-13)
        assert np.array_equal(np.isfinite(V), finite)
    np.testing.assert_allclose(s, sr, rtol=1e-12)
    np.testing.assert_allclose(g, gr, rtol=1e-12)
    # without keep_scores, HC2/HC3 put the sandwich rows in the scores' place and leave V alone
    V2 = np.full_like(V, 7.0)
    g2, s2 = np.zeros(p), np.zeros(p)
    tile_scores(ZE2, n, 100, y, mode, V2, e, fitted, h, g2, s2, False, np.zeros(0))
    np.testing.assert_array_equal(s2, s)
    np.testing.assert_array_equal(g2, g)
    if mode in (SCORES_HC2, SCORES_HC3):
        np.testing.assert_array_equal(ZE2[:, :p][np.isfinite(V)], V[np.isfinite(V)])
        assert (V2 == 7.0).all()
    else:
        np.testing.assert_array_equal(ZE2[:, :p], ZE[:, :p])
        np.testing.assert_array_equal(V2[np.isfinite(V)], V[np.isfinite(V)])
    # a swept-out key's share of each row's leverage (h0 = 1/n_g) adds to ‖zᵢ‖² and moves V
    h0 = np.linspace(0.0, 0.5, m)
    Vr3, hr3, _, _, _ = tile_scores_reference(Z, ee, mode, h0[100:])
    V3 = np.empty_like(V)
    tile_scores(ZE3, n, 100, y, mode, V3, e, fitted, h, np.zeros(p), np.zeros(p), True, h0)
    np.testing.assert_allclose(h[100:], hr3, rtol=1e-14)
    if mode != SCORES:
        finite = np.isfinite(Vr3)
        np.testing.assert_allclose(V3[finite], Vr3[finite], rtol=1e-13)


def test_a_bad_part_while_the_grid_sample_is_gathered_fails_cleanly(tmp_path, fleet):
    """Parts wait for the bin grids' sample; one failing then must stop the pass with its own error
    (not hang the parts that wait for the sample, nor fold the parts parked before it)."""
    import threading

    table, _, _ = fleet
    model = tallfit.fit(table, target="power_w", features=FEATURES, missing={"*": "fail"})
    # p0 fails at its row 15,000 while p1, on the other worker, holds a full sample and waits
    first = table.slice(0, 20_000)
    cpu = first.column("cpu_util").to_numpy().copy()
    cpu[15_000] = np.nan
    pq.write_table(first.set_column(0, "cpu_util", pa.array(cpu)), tmp_path / "p0.parquet")
    pq.write_table(table, tmp_path / "p1.parquet")
    assert table.num_rows > SAMPLE_ROWS
    caught: list[BaseException] = []

    def run() -> None:
        try:
            second_pass(model, str(tmp_path), batch_rows=1000, workers=2)
        except BaseException as exc:  # handed to the test's thread
            caught.append(exc)

    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(60)
    assert not t.is_alive(), "the pass hung after a part failed during the grid sample"
    assert len(caught) == 1 and "p0.parquet" in str(caught[0]) and "cpu_util" in str(caught[0])


def test_one_sweep_of_fitted_values_and_residuals_equals_the_separate_kernels():
    """kernels.residual_block_sums gives the bits of the fitted-value bins (grid_bin_sums_rows), the
    heat map (two grid_index calls, then a count per pair of cells by numpy) and the residual
    sketch (residual_moments), values beyond every grid included."""
    from tallfit.diagnostics.kernels import grid_bin_sums_rows, grid_index, residual_block_sums, residual_moments

    rng = np.random.default_rng(21)
    m = 5000
    fitted = rng.normal(100, 20, m)
    e = rng.standard_t(3, m) * 4
    fitted[:3] = [-1e9, 1e9, 100.0]
    e[3:6] = [-1e6, 1e6, 0.0]
    fcells, hcells, rcells = 1024, 64, 4800
    flo, fscale = 40.0, fcells / 120.0
    hf, he = (30.0, hcells / 140.0), (-16.0, hcells / 32.0)
    rlo, rscale = -48.0, rcells / 96.0
    ref_bins = np.zeros((1, fcells + 2, 4))
    grid_bin_sums_rows(fitted[:, None], 0, m, np.array([0]), e, np.array([flo]), np.array([fscale]), fcells,
                       ref_bins, np.empty(m, dtype=np.int32))
    a, b = np.empty(m, dtype=np.int32), np.empty(m, dtype=np.int32)
    grid_index(fitted, hf[0], hf[1], hcells, a)
    grid_index(e, he[0], he[1], hcells, b)
    ref_heat = np.zeros((hcells + 2, hcells + 2), dtype=np.int64)
    np.add.at(ref_heat, (a, b), 1)
    ref_hist = np.zeros(rcells + 2, dtype=np.int64)
    ref_mom = np.array([0.0, 0.0, 0.0, 0.0, np.inf, -np.inf])
    residual_moments(e, rlo, rscale, rcells, ref_hist, ref_mom)

    bins = np.zeros((fcells + 2, 4))
    franges = np.array([np.inf, -np.inf])
    heat = np.zeros_like(ref_heat)
    hist = np.zeros_like(ref_hist)
    mom = np.array([0.0, 0.0, 0.0, 0.0, np.inf, -np.inf])
    residual_block_sums(fitted, e, np.array([flo, fscale, fcells]), bins, franges,
                        np.array([hf[0], hf[1], he[0], he[1], hcells]), heat, np.array([rlo, rscale, rcells]), hist, mom)
    np.testing.assert_array_equal(bins, ref_bins[0])
    np.testing.assert_array_equal(heat, ref_heat)
    np.testing.assert_array_equal(hist, ref_hist)
    np.testing.assert_array_equal(mom, ref_mom)
    assert tuple(franges) == (fitted.min(), fitted.max())
