"""Within one batch, each column is converted to float once and each derived array computed
once, whichever annotators ask (a consistency check of the sharing, not of any number)."""

import numpy as np
import pyarrow as pa
import pytest

from annotator.api import Batch

calls = []


def doubled(values: np.ndarray) -> np.ndarray:
    calls.append(1)
    return values * 2.0


def _batch(shared, owner):
    table = pa.table({"z": pa.array([0.5, None, 2.0]), "n": pa.array([1, 2, 3])})
    resolve = {"redshift": ("input", "z"), "count": ("input", "n")}
    return Batch(table, resolve, {}, lambda *a: None, owner, shared)


def test_values_are_shared_and_read_only_across_annotators():
    shared: dict = {}
    first, second = _batch(shared, "a"), _batch(shared, "b")
    z1, z2 = first.values("redshift"), second.values("redshift")
    assert z1 is z2
    np.testing.assert_array_equal(z1, [0.5, np.nan, 2.0])
    with pytest.raises(ValueError):
        z1[0] = 1.0
    assert first.values("count").dtype == np.float64


def test_derived_is_computed_once_per_batch():
    calls.clear()
    shared: dict = {}
    a = _batch(shared, "a").derived("redshift", doubled)
    b = _batch(shared, "b").derived("redshift", doubled)
    assert a is b and len(calls) == 1
    np.testing.assert_array_equal(a, [1.0, np.nan, 4.0])
    _batch({}, "c").derived("redshift", doubled)  # a new batch computes it again
    assert len(calls) == 2
