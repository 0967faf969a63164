"""The compiled row summaries against numpy, the reference library they replace.

Each figure is checked against the numpy calls the verdict and the dense rule made before:
argmax (first index of equal maxima), max, the max with the best column masked, min, a
comparison summed, and a stable argsort for the k best. Values come in small integer steps
so that equal values, the case where the orders could differ, are common.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numpy.typing import NDArray

from service.engine import rows

matrices = st.tuples(st.integers(1, 6), st.integers(1, 50)).flatmap(
    lambda shape: hnp.arrays(
        np.float32,
        shape,
        elements=st.integers(-8, 8).map(lambda v: np.float32(v) / np.float32(4)),
    )
)


@settings(max_examples=300, deadline=None)
@given(m=matrices, threshold=st.integers(-3, 3))
def test_top2_is_numpys_argmax_max_masked_max_min_and_count(
    m: NDArray[np.float32], threshold: int
) -> None:
    best, top, runner, low, above = rows.top2(m, float(threshold))
    np.testing.assert_array_equal(best, m.argmax(axis=1))
    np.testing.assert_array_equal(top, m.max(axis=1))
    masked = m.copy()
    masked[np.arange(m.shape[0]), best] = -np.inf
    np.testing.assert_array_equal(runner, masked.max(axis=1))  # -inf with one column
    np.testing.assert_array_equal(low, m.min(axis=1))
    np.testing.assert_array_equal(above, (m >= np.float32(threshold)).sum(axis=1))
    assert best.dtype == np.int64
    assert top.dtype == np.float32


@settings(max_examples=300, deadline=None)
@given(m=matrices, data=st.data())
def test_best_k_is_a_stable_descending_argsort_cut_to_k(
    m: NDArray[np.float32], data: st.DataObject
) -> None:
    k = data.draw(st.integers(1, m.shape[1]))
    idx, val = rows.best_k(m, k)
    order = np.argsort(-m, axis=1, kind="stable")[:, :k]
    np.testing.assert_array_equal(idx, order)
    np.testing.assert_array_equal(val, np.take_along_axis(m, order, axis=1))


def test_the_summaries_read_any_layout_and_refuse_empty_rows() -> None:
    m = np.arange(12, dtype=np.float64).reshape(3, 4)[:, ::-1]  # float64, not contiguous
    best, top, _, _, _ = rows.top2(m)
    assert best.tolist() == [0, 0, 0]
    assert top.tolist() == [3.0, 7.0, 11.0]
    assert rows.best_k(m, 2)[0].tolist() == [[0, 1]] * 3
    with pytest.raises(ValueError, match="at least one column"):
        rows.top2(np.zeros((2, 0), dtype=np.float32))
    with pytest.raises(ValueError, match="k must be from 1"):
        rows.best_k(np.zeros((2, 3), dtype=np.float32), 4)


def test_the_kernels_are_compiled_for_their_one_signature() -> None:
    assert len(rows._top2.signatures) == 1
    assert len(rows._best_k.signatures) == 1
