"""The shared 16-bit radix order (unbin.models.radix.stable_order) against numpy's stable
sort, ``np.argsort(key, kind="stable")`` (a stable order is unique, so the two must agree
index for index)."""

from __future__ import annotations

import numpy as np
import pytest

from unbin.models.radix import stable_order

CASES = ([(bits, np.int64) for bits in (1, 8, 16, 17, 31, 32, 33, 47, 48, 49, 62)]
         + [(bits, np.uint32) for bits in (1, 16, 17, 32)])


@pytest.mark.parametrize(("bits", "dtype"), CASES)
def test_stable_order_is_numpy_stable_argsort(bits: int, dtype: type) -> None:
    # source: numpy.argsort(kind="stable"); many ties (few distinct keys) and wide keys
    rng = np.random.default_rng(bits)
    for distinct in (3, 5000):
        values: np.ndarray = rng.integers(0, 2**bits, distinct, dtype=np.uint64).astype(dtype)
        key = values[rng.integers(0, distinct, 20_000)]
        assert np.array_equal(stable_order(key), np.argsort(key, kind="stable"))


def test_empty_and_single() -> None:
    # source: numpy.argsort(kind="stable")
    assert stable_order(np.zeros(0, dtype=np.int64)).size == 0
    assert np.array_equal(stable_order(np.array([7], dtype=np.int64)), [0])
