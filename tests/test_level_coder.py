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
