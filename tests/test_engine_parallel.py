"""Parallel folding: the same answer (to rounding) whatever the worker count, batch size or file order."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm

import tallfit
from tallfit.engine.parallel import BufferPool, fold_round_robin, run_tasks, tree_merge, worker_count
from tallfit.errors import TallfitError

FEATURES = ["value", "capital"]


@pytest.fixture(scope="module")
def grunfeld_files(tmp_path_factory):
    # Reference data: statsmodels.datasets.grunfeld (Grunfeld's firm-year investment panel).
    df = sm.datasets.grunfeld.load_pandas().data[["invest", "value", "capital"]].astype(float)
    folder = tmp_path_factory.mktemp("grunfeld")
    paths = []
    for i, start in enumerate(range(0, len(df), 44)):
        part = df.iloc[start : start + 44]
        path = folder / f"part-{i}.parquet"
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), path, row_group_size=17)
        paths.append(str(path))
    ref = sm.OLS(df["invest"], sm.add_constant(df[FEATURES])).fit()  # reference: statsmodels OLS
    return paths, ref


@pytest.mark.parametrize("method", ["qr", "gram"])
@pytest.mark.parametrize("workers", [1, 2, 3])
@pytest.mark.parametrize("batch_rows", [7, 64, 10_000])
def test_workers_and_batches_agree_with_statsmodels(grunfeld_files, workers, batch_rows, method):
    paths, ref = grunfeld_files
    r = tallfit.fit(paths, "invest", FEATURES, workers=workers, batch_rows=batch_rows, method=method)
    assert r.inference.n_used == 220
    assert np.allclose(r.inference.estimate, ref.params.values, rtol=1e-10, atol=0)
    assert np.allclose(r.inference.std_error, ref.bse.values, rtol=1e-9, atol=0)
    assert np.isclose(r.inference.r_squared, ref.rsquared, rtol=1e-11)


def test_file_order_changes_only_rounding(grunfeld_files):
    paths, _ = grunfeld_files
    a = tallfit.fit(paths, "invest", FEATURES, workers=2)
    b = tallfit.fit(list(reversed(paths)), "invest", FEATURES, workers=2)
    c = tallfit.fit([paths[2], paths[0], paths[4], paths[1], paths[3]], "invest", FEATURES, workers=3)
    for other in (b, c):
        assert np.allclose(other.inference.estimate, a.inference.estimate, rtol=1e-12, atol=0)
        assert other.accumulator.n_used == a.accumulator.n_used


def test_result_does_not_depend_on_worker_count_for_a_file_set(grunfeld_files):
    """One accumulator per file merged by the same tree: bit-identical for any number of workers."""
    paths, _ = grunfeld_files
    one = tallfit.fit(paths, "invest", FEATURES, workers=1)
    two = tallfit.fit(paths, "invest", FEATURES, workers=2)
    four = tallfit.fit(paths, "invest", FEATURES, workers=4)
    assert np.array_equal(one.accumulator.R, two.accumulator.R)
    assert np.array_equal(one.accumulator.R, four.accumulator.R)


def test_progress_counts_every_row_once(grunfeld_files):
    paths, _ = grunfeld_files
    seen: dict[int, int] = {}

    def hook(rows, file_index):
        seen[file_index] = seen.get(file_index, 0) + rows

    tallfit.fit(paths, "invest", FEATURES, workers=3, batch_rows=10, progress=hook)
    assert sorted(seen) == list(range(5)) and sum(seen.values()) == 220


def test_a_bad_file_among_many_is_named(grunfeld_files, tmp_path):
    paths, _ = grunfeld_files
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(open(paths[0], "rb").read()[:200])  # a truncated file
    with pytest.raises(TallfitError, match="broken.parquet"):
        tallfit.fit(paths[:2] + [str(bad)] + paths[2:], "invest", FEATURES, workers=2)


def test_tree_merge_is_balanced_and_ordered():
    assert tree_merge(list("abcde"), lambda x, y: f"({x}{y})") == "(((ab)(cd))e)"
    with pytest.raises(ValueError):
        tree_merge([], lambda x, y: x)


def test_round_robin_folds_every_block_and_reraises_failures():
    accs = fold_round_robin(iter(range(10)), 3, list, lambda acc, b: acc.append(b))
    assert accs == [[0, 3, 6, 9], [1, 4, 7], [2, 5, 8]]

    def failing(acc, b):
        if b == 5:
            raise RuntimeError("block 5 failed")
        acc.append(b)

    with pytest.raises(RuntimeError, match="block 5"):
        fold_round_robin(iter(range(100)), 2, list, failing)
    assert run_tasks([lambda i=i: i * i for i in range(7)], 3) == [i * i for i in range(7)]


def test_buffer_pool_reuses_only_its_own_buffers():
    pool = BufferPool()
    a = pool.take((4, 3))
    assert a.flags.f_contiguous and a.shape == (4, 3)
    pool.give(a)
    pool.give(np.empty((4, 3), order="F"))  # not from the pool: ignored
    assert pool.take((4, 3)) is a
    assert pool.take((4, 3)) is not a


def test_worker_count_is_checked():
    assert worker_count(None) >= 1 and worker_count(2) == 2
    for bad in (0, -1, 1.5, True):
        with pytest.raises(ValueError, match="workers"):
            worker_count(bad)


# ---- one Parquet file split into runs of row groups (engine.parallel.SPAN_ROWS)

@pytest.fixture()
def one_file_of_many_row_groups(tmp_path, monkeypatch):
    """Grunfeld's panel as one Parquet file of 13 row groups, split into parts of ≥ 40 rows."""
    import tallfit.engine.parallel as parallel

    monkeypatch.setattr(parallel, "SPAN_ROWS", 40)
    df = sm.datasets.grunfeld.load_pandas().data[["invest", "value", "capital"]].astype(float)
    path = tmp_path / "panel.parquet"
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), path, row_group_size=17)
    ref = sm.OLS(df["invest"], sm.add_constant(df[FEATURES])).fit()  # reference: statsmodels OLS
    return str(path), ref


def test_parts_of_one_file_cover_its_row_groups_in_order(one_file_of_many_row_groups):
    from tallfit.inputs import as_source

    path, _ = one_file_of_many_row_groups
    parts = as_source(path).parts(40)
    spans = [sub._span for sub, _ in parts]
    assert spans[0][0] == 0 and spans[-1][1] == 13  # 220 rows in groups of 17: 13 row groups
    assert all(a[1] == b[0] for a, b in zip(spans, spans[1:]))
    assert [s[2] for s in spans] == [17 * s[0] for s in spans]  # first row of each part, in file rows
    rows = [sum(c.batch.num_rows for c in sub.batches(["invest"], 7)) for sub, _ in parts]
    assert sum(rows) == 220 and all(r >= 40 for r in rows)


@pytest.mark.parametrize("method", ["qr", "gram"])
def test_one_split_file_agrees_with_statsmodels_for_any_worker_count(one_file_of_many_row_groups, method):
    path, ref = one_file_of_many_row_groups
    fits = [tallfit.fit(path, "invest", FEATURES, workers=w, batch_rows=8, method=method) for w in (1, 2, 3)]
    for r in fits:
        assert r.inference.n_used == 220
        assert np.allclose(r.inference.estimate, ref.params.values, rtol=1e-10, atol=0)
        assert np.allclose(r.inference.std_error, ref.bse.values, rtol=1e-9, atol=0)
    for r in fits[1:]:  # same parts, same merge tree: bit-identical
        assert np.array_equal(r.accumulator.R, fits[0].accumulator.R)


def test_parts_number_their_rows_from_the_start_of_the_file(one_file_of_many_row_groups):
    """Messages name rows of the file (engine.local.chunk_label), so a part's chunks carry file rows."""
    from tallfit.engine.local import chunk_label
    from tallfit.inputs import as_source

    path, _ = one_file_of_many_row_groups
    expected = 0
    for sub, file_index in as_source(path).parts(40):
        assert file_index == 0
        for chunk in sub.batches(["invest"], 8):
            assert chunk.row_start == expected
            assert chunk_label(sub, chunk) == f"{path}, rows {expected}-{expected + chunk.batch.num_rows - 1}"
            expected += chunk.batch.num_rows
    assert expected == 220


def test_row_group_spans_take_whole_groups_and_a_short_tail_joins_the_last():
    from tallfit.sources.base import _row_group_spans

    assert _row_group_spans([10] * 10, 30) == [(0, 3, 0), (3, 6, 30), (6, 10, 60)]
    assert _row_group_spans([10] * 7, 30) == [(0, 3, 0), (3, 7, 30)]
    assert _row_group_spans([100, 5, 5], 50) == [(0, 3, 0)]
    assert _row_group_spans([100, 30, 5], 50) == [(0, 1, 0), (1, 3, 100)]
    assert _row_group_spans([], 50) == []


def test_in_place_fold_equals_the_copying_fold():
    from tallfit.kernels.tsqr import fold_rows

    rng = np.random.default_rng(3)
    A = np.asfortranarray(rng.standard_normal((5000, 9)))
    R0 = np.triu(rng.standard_normal((9, 9)))
    padded = np.empty((5064, 9), order="F")[:5000]
    padded[...] = A
    a = fold_rows(R0, A, tile_rows=700)
    b = fold_rows(R0, padded, tile_rows=700, overwrite=True)
    assert np.array_equal(a, b)  # the same reflectors on the same numbers
    assert not np.array_equal(padded, A)  # it did work in place
    c = np.linalg.qr(np.vstack([R0, A]), mode="r")  # reference: numpy's Householder QR
    assert np.allclose(np.abs(a), np.abs(c), rtol=1e-12, atol=1e-12)


def test_prefetched_in_order_keeps_the_serial_order_and_reraises():
    from tallfit.engine.prefetch import prefetched_in_order

    producers = [lambda i=i: iter(range(10 * i, 10 * i + 7)) for i in range(9)]
    for workers in (1, 2, 3):
        assert list(prefetched_in_order(producers, workers, depth=2)) == [10 * i + j for i in range(9) for j in range(7)]

    def broken():
        yield 1
        raise ValueError("part 2 is unreadable")

    got = []
    with pytest.raises(ValueError, match="part 2"):
        for item in prefetched_in_order([lambda: iter([0]), broken, lambda: iter([5])], 2):
            got.append(item)
    assert got == [0, 1]


def test_design_blocks_from_parts_equal_a_serial_stream(one_file_of_many_row_groups):
    """Row groups decoded on every core come out as the same blocks, in the same order."""
    from tallfit.design.build import make_spec
    from tallfit.engine.local import design_blocks
    from tallfit.inputs import as_source

    path, _ = one_file_of_many_row_groups
    spec = make_spec("invest", FEATURES)
    serial = list(design_blocks(as_source(path), spec, 5, prefetch=0))
    parallel = list(design_blocks(as_source(path), spec, 5))
    assert [(b.file_index, b.row_start, b.n_read) for b in parallel] == [(b.file_index, b.row_start, b.n_read) for b in serial]
    assert all(np.array_equal(a.A, b.A) for a, b in zip(serial, parallel))
    assert sum(b.n_used for b in parallel) == 220


def test_folding_in_place_keeps_the_column_ranges():
    from tallfit.accumulate.factor import FactorAccumulator

    rng = np.random.default_rng(5)
    A = np.asfortranarray(rng.normal(size=(3000, 4)) * [1, 2, 3, 4])
    lo, hi = A.min(axis=0), A.max(axis=0)
    acc = FactorAccumulator.create(["a", "b", "c", "y"])
    acc.update(A.copy(order="F"), overwrite=True)
    assert np.array_equal(acc.col_min, lo) and np.array_equal(acc.col_max, hi)
