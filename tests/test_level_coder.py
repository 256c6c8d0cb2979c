"""Level codes while streaming: one numbering whatever form each batch's labels arrive in.

Property tests on invented labels (no reference needed: the codes must be a consistent,
first-appearance numbering of the distinct labels, nulls apart)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from tallfit.design.categorical import LevelCoder


def dictionary(indices, labels):
    return pa.DictionaryArray.from_arrays(pa.array(indices, type=pa.int32()), pa.array(labels, type=pa.string()))


BATCHES = [
    dictionary([0, 1, 0], ["a", "b"]),
    dictionary([0, 1, 2, 2], ["c", None, "a"]),  # a null inside the dictionary itself
    pa.array(["d", None, "b", "e"]),  # plain strings with a null row
    dictionary([1, 0], ["b", "f"]),
]


def labels_of(arr) -> list:
    return arr.dictionary_decode().to_pylist() if pa.types.is_dictionary(arr.type) else arr.to_pylist()


@pytest.mark.parametrize("order", [[0, 1, 2, 3], [1, 0, 3, 2], [2, 3, 1, 0], [3, 1, 2, 0]])
def test_codes_name_one_level_each_whatever_the_batch_form(order):
    """Same label, same code in every batch; distinct labels, distinct codes; nulls -2."""
    coder = LevelCoder("region")
    pairs = []
    for i in order:
        codes = coder.codes(BATCHES[i], "test rows").tolist()
        pairs += list(zip(labels_of(BATCHES[i]), codes))
    names = coder.names
    for label, code in pairs:
        if label is None:
            assert code == -2
        else:
            assert 0 <= code < coder.n_columns and names[code] == f"region[{label}]"
    assert sorted(names) == sorted({f"region[{v}]" for v, _ in pairs if v is not None})


def test_parts_adopted_in_order_number_levels_as_one_stream():
    whole, first, second = LevelCoder("rack"), LevelCoder("rack"), LevelCoder("rack")
    for arr in BATCHES:
        whole.codes(arr, "rows")
    for arr in BATCHES[:2]:
        first.codes(arr, "rows")
    for arr in BATCHES[2:]:
        second.codes(arr, "rows")
    mapping = first.adopt(second)
    assert first.names == whole.names
    assert np.array_equal(mapping, [whole.names.index(n) for n in second.names])


def _as_strings(arr: pa.Array) -> pa.Array:
    return arr.cast(pa.string())


INT_BATCHES = [
    pa.array([7, -3, 7, 0], type=pa.int64()),
    pa.array([None, 12, -3, None], type=pa.int32()),  # null rows
    pa.array([5, 0, 2**40, 12], type=pa.int64()),
]


def test_integer_levels_number_as_their_strings_do():
    """An integer column takes the integer hash table; its codes and level names must equal those
    of the same values given as strings (the general path), nulls -2, negatives and big values
    included."""
    ints, strings = LevelCoder("host_id"), LevelCoder("host_id")
    for arr in INT_BATCHES:
        a = ints.codes(arr, "rows")
        b = strings.codes(_as_strings(arr), "rows")
        assert a.tolist() == b.tolist()
    assert ints._ints is not None and strings._ints is None  # the integer path was taken
    assert ints.names == strings.names == [f"host_id[{v}]" for v in ("7", "-3", "0", "12", "5", str(2**40))]
    assert ints.n_columns == 6


def test_integer_parts_adopted_in_order_number_levels_as_one_stream():
    whole, first, second = LevelCoder("host_id"), LevelCoder("host_id"), LevelCoder("host_id")
    for arr in INT_BATCHES:
        whole.codes(arr, "rows")
    first.codes(INT_BATCHES[0], "rows")
    for arr in INT_BATCHES[1:]:
        second.codes(arr, "rows")
    mapping = first.adopt(second)
    assert first.names == whole.names
    assert np.array_equal(mapping, [whole.names.index(n) for n in second.names])
    empty = LevelCoder("host_id")  # a coder that saw no rows yet takes the other's numbering
    assert empty.adopt(whole).tolist() == list(range(whole.n_columns)) and empty.names == whole.names


def test_fixed_coder_maps_integer_values_through_their_strings():
    """A fixed coder (prediction, later passes) knows levels by name: integer rows find theirs, an
    unseen value follows the policy."""
    fixed = LevelCoder("host_id", fixed={"7": 0, "-3": -1, "12": 1}, n_columns=2, unseen="reference")
    codes = fixed.codes(pa.array([12, 7, None, -3, 99], type=pa.int64()), "rows")
    assert codes.tolist() == [1, 0, -2, -1, -1]
    assert fixed.unseen_rows == 1 and fixed.unseen_levels == {"99": 1}


def test_fixed_coder_on_dictionaries_looks_up_used_entries_only():
    """A fixed coder maps a dictionary column by its entries, once per dictionary: an entry no row
    uses (a level the model never saw) is no error; once a later batch with the same dictionary
    uses it, it is; a null entry and a null row code as nulls (-2)."""
    from tallfit.errors import DesignError

    labels = ["a", "b", None, "zz"]  # "zz": never seen by the model
    fixed = LevelCoder("rack", fixed={"a": 0, "b": -1}, n_columns=1)
    assert fixed.codes(dictionary([1, 0, 2, 0], labels), "batch 1").tolist() == [-1, 0, -2, 0]
    nulls = pa.DictionaryArray.from_arrays(pa.array([0, None, 1], type=pa.int32()), pa.array(labels))
    assert fixed.codes(nulls, "batch 2").tolist() == [0, -2, -1]
    with pytest.raises(DesignError, match="level 'zz' in batch 3"):
        fixed.codes(dictionary([0, 3], labels), "batch 3")
    lenient = LevelCoder("rack", fixed={"a": 0, "b": -1}, n_columns=1, unseen="reference")
    for _ in range(2):  # the second batch reuses the dictionary's map, and still counts its rows
        assert lenient.codes(dictionary([3, 0, 3], labels), "rows").tolist() == [-1, 0, -1]
    assert lenient.unseen_rows == 4
    assert fixed.codes(dictionary([0, 1], ["b", "a"]), "rows").tolist() == [-1, 0]  # another dictionary: a new map
