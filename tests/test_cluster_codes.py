"""Cluster key codes (engine/cluster_codes.py): dense codes in order of first appearance for label,
dictionary and integer keys, the merge of parts equal to coding the concatenated stream, pairs of
two keys, and the error for a missing key. Property tests on invented keys, against a plain dict
that numbers keys as it meets them."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tallfit
from tallfit.engine.cluster_codes import KeyCoder, PairCoder
from tallfit.engine.second_pass import second_pass
from tallfit.errors import DesignError

KINDS = ("string", "large_string", "dictionary", "shuffled dictionary", "int64", "int16")


def _first_seen(values, seen: dict) -> np.ndarray:
    return np.array([seen.setdefault(v, len(seen)) for v in values], dtype=np.int64)


def _column(keys: list[int], kind: str, rng: np.random.Generator) -> pa.Array:
    """The keys as a column of the given kind (labels "k<key>" for the string kinds)."""
    if kind == "int64":
        return pa.array(np.asarray(keys, dtype=np.int64) * 7919 - 10**12)
    if kind == "int16":
        return pa.array(np.asarray(keys, dtype=np.int16) - 100, pa.int16())
    labels = [f"k{k}" for k in keys]
    if kind == "string":
        return pa.array(labels)
    if kind == "large_string":
        return pa.array(labels, pa.large_string())
    if kind == "dictionary":
        return pa.array(labels).dictionary_encode()
    # a file's dictionary: every value of the file in any order, plus values no row of this batch has
    values = sorted(set(labels) | {f"unused{i}" for i in range(3)})
    values = [values[i] for i in rng.permutation(len(values))]
    pos = {v: i for i, v in enumerate(values)}
    return pa.DictionaryArray.from_arrays(pa.array([pos[v] for v in labels], pa.int32()), pa.array(values))


def _stream(keys: list[int], cuts: list[int]) -> list[list[int]]:
    edges = [0] + sorted({min(c, len(keys)) for c in cuts}) + [len(keys)]
    return [keys[a:b] for a, b in zip(edges[:-1], edges[1:])]


keys_st = st.lists(st.integers(0, 40), min_size=0, max_size=300)
cuts_st = st.lists(st.integers(0, 300), max_size=6)


@settings(max_examples=60, deadline=None)
@given(keys=keys_st, cuts=cuts_st, kind=st.sampled_from(KINDS), seed=st.integers(0, 1000))
def test_codes_follow_first_appearance_across_batches(keys, cuts, kind, seed):
    rng = np.random.default_rng(seed)
    coder, seen = KeyCoder("host"), {}
    for batch in _stream(keys, cuts):
        codes = coder.encode(_column(batch, kind, rng), "batch")
        np.testing.assert_array_equal(codes, _first_seen(batch, seen))
    assert coder.groups == len(seen) == len(set(keys))  # unused dictionary entries get no code


@settings(max_examples=60, deadline=None)
@given(keys=keys_st, cuts=cuts_st, kind=st.sampled_from(KINDS), seed=st.integers(0, 1000))
def test_merging_parts_in_order_equals_one_stream(keys, cuts, kind, seed):
    """Each part coded on its own, then absorbed in data order: the part's codes mapped through
    the returned lut are those of one coder reading all rows."""
    rng = np.random.default_rng(seed)
    one = KeyCoder("host")
    whole = [one.encode(_column(part, kind, rng), "all") for part in _stream(keys, cuts)]
    merged, mapped = None, []
    for part in _stream(keys, cuts):
        coder = KeyCoder("host")
        codes = coder.encode(_column(part, kind, rng), "part")
        if merged is None:
            merged, lut = coder, np.arange(coder.groups)
        else:
            lut = merged.absorb(coder)
        assert lut.shape == (coder.groups,)
        mapped.append(lut[codes] if codes.size else codes)
    for a, b in zip(whole, mapped):
        np.testing.assert_array_equal(a, b)
    assert (merged.groups if merged else 0) == one.groups == len(set(keys))


@settings(max_examples=40, deadline=None)
@given(a=st.lists(st.integers(0, 6), min_size=1, max_size=200), seed=st.integers(0, 1000),
       cut=st.integers(0, 200))
def test_pairs_in_first_appearance_and_merged_as_one_stream(a, seed, cut):
    rng = np.random.default_rng(seed)
    b = rng.integers(0, 5, len(a)).tolist()
    ka, kb = np.array(a, np.int64), np.array(b, np.int64)
    one = PairCoder("a×b")
    np.testing.assert_array_equal(one.encode(ka, kb), _first_seen(zip(a, b), {}))
    # two parts, each with its own key coders, merged through the key luts
    cut = min(cut, len(a))
    coders = []
    for lo, hi in ((0, cut), (cut, len(a))):
        ca, cb, pc_ = KeyCoder("a"), KeyCoder("b"), PairCoder("a×b")
        codes = pc_.encode(ca.encode(pa.array(ka[lo:hi]), "p"), cb.encode(pa.array(kb[lo:hi]), "p"))
        coders.append((ca, cb, pc_, codes))
    (ca, cb, first, c0), (da, db, second, c1) = coders
    lut = first.absorb(second, ca.absorb(da), cb.absorb(db))
    np.testing.assert_array_equal(np.concatenate([c0, lut[c1] if c1.size else c1]), one.encode(ka, kb))
    assert first.groups == one.groups == len(set(zip(a, b)))


def test_first_appearance_for_each_key_kind():
    for col, expect in [
        (pa.array(["b", "a", "b", "c", "a"]), [0, 1, 0, 2, 1]),
        (pa.DictionaryArray.from_arrays(pa.array([2, 0, 2, 1]), pa.array(["x", "y", "z", "w"])), [0, 1, 0, 2]),
        (pa.array([30, -4, 30, 2**62], pa.int64()), [0, 1, 0, 2]),
        (pa.array([True, False, True]), [0, 1, 0]),
    ]:
        coder = KeyCoder("k")
        np.testing.assert_array_equal(coder.encode(col, "t"), expect)
        assert coder.groups == max(expect) + 1


def test_whole_floats_are_the_integer_keys_and_fractions_are_kept():
    coder = KeyCoder("store")
    np.testing.assert_array_equal(coder.encode(pa.array([5, 7], pa.int32()), "f0"), [0, 1])
    np.testing.assert_array_equal(coder.encode(pa.array([7.0, 5.0, 2.5, -0.0, 0.0]), "f1"), [1, 0, 2, 3, 3])
    np.testing.assert_array_equal(coder.encode(pa.array([0, 2.5, 1e300]), "f2"), [3, 2, 4])
    assert coder.groups == 5


@pytest.mark.parametrize("column, n", [
    (pa.array(["a", None, "b", None]), 2),
    (pa.array(["a", None]).dictionary_encode(), 1),
    (pa.DictionaryArray.from_arrays(pa.array([0, 1, 1]), pa.array(["a", None])), 2),  # null in the dictionary
    (pa.array([1, None, 3]), 1),
    (pa.array([1.5, float("nan"), None]), 2),  # NaN is a missing key
    (pa.array([None, None, None]), 3),
])
def test_a_missing_key_is_an_error_naming_the_place(column, n):
    where = "sales/part-3.parquet, rows 6000-11999"
    with pytest.raises(DesignError) as err:
        KeyCoder("store").encode(column, where)
    assert str(err.value) == (
        f"cluster column 'store' has {n} missing value(s) in {where}: every used row needs a cluster; "
        "fill them or drop those rows before fitting")


def test_a_key_of_an_unusable_type_is_a_design_error():
    with pytest.raises(DesignError, match="cannot be a cluster key"):
        KeyCoder("k").encode(pa.array([{"a": 1}, {"a": 2}]), "t")


def test_clusters_of_a_dictionary_key_are_the_values_of_the_used_rows():
    """A slice of a dictionary column keeps the whole dictionary: only the keys of its rows count
    as clusters, and the sums equal those of the same keys as plain labels."""
    rng = np.random.default_rng(8)
    n = 400
    labels = pa.array([f"s{i % 50}" for i in range(n)])
    x = rng.normal(size=n)
    y = 2 * x + rng.normal(size=n)
    table = pa.table({"x": x, "y": y, "store": labels.dictionary_encode()})
    model = tallfit.fit(table, target="y", features=["x"])
    part = table.slice(0, 30)
    as_dict = second_pass(model, part, cluster=["store"], diagnostics=False).clusters[0]
    plain = part.set_column(2, "store", labels.slice(0, 30))
    as_text = second_pass(model, plain, cluster=["store"], diagnostics=False).clusters[0]
    assert as_dict.groups == as_text.groups == 30
    np.testing.assert_array_equal(as_dict.S[:30], as_text.S[:30])
