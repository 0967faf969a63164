"""Per-row summaries of a score matrix (best column, runner-up, least, count above a
threshold, the k best in order) in one compiled pass over each row.

The verdict and the dense rule's ranking ask these of every settled state's dot products
with the stored patterns. As numpy calls they were a dozen passes (argmax, a masked max, min,
a comparison and a sum, argpartition with two gathers and a sort), each with a few
microseconds of call overhead: for one state at P = 1,000 the calls cost several times the
arithmetic. The results are the calls' own (first index on equal maxima), except that
``best_k`` orders equal values by column where argpartition left their order unspecified.

Examples
--------
>>> import numpy as np
>>> m = np.array([[0.5, 2.0, 2.0, -1.0]], dtype=np.float32)
>>> best, top, runner, low, above = top2(m, threshold=0.0)
>>> best.tolist(), top.tolist(), runner.tolist(), low.tolist(), above.tolist()
([1], [2.0], [2.0], [-1.0], [3])
>>> idx, val = best_k(m, 3)
>>> idx.tolist(), val.tolist()
([[1, 2, 0]], [[2.0, 2.0, 0.5]])
"""

from __future__ import annotations

import math
from typing import Any, Final

import numpy as np
from numpy.typing import NDArray

from .bits import compile_kernel

__all__ = ["best_k", "top2"]


def _top2_py(m, threshold, best, top, runner, low, above):  # type: ignore[no-untyped-def]  # pragma: no cover - compiled
    # best: first column holding the row's maximum; runner: the maximum over the other
    # columns (the maximum again where it is held twice; -inf with one column)
    n_rows, n_cols = m.shape
    for i in range(n_rows):
        b = 0
        t = m[i, 0]
        r = -np.inf
        lo = t
        n = 1 if t >= threshold else 0
        for j in range(1, n_cols):
            v = m[i, j]
            if v > t:
                r = t  # the old best is now the best of the others so far
                t = v
                b = j
            elif v > r:
                r = v
            if v < lo:
                lo = v
            if v >= threshold:
                n += 1
        best[i] = b
        top[i] = t
        runner[i] = r
        low[i] = lo
        above[i] = n


def _best_k_py(m, idx, val):  # type: ignore[no-untyped-def]  # pragma: no cover - compiled
    # the k = idx.shape[1] largest of each row, largest first, equal values by column
    n_rows, n_cols = m.shape
    k = idx.shape[1]
    for i in range(n_rows):
        filled = 0
        for j in range(n_cols):
            v = m[i, j]
            if filled == k and not v > val[i, k - 1]:
                continue
            pos = filled if filled < k else k - 1
            while pos > 0 and val[i, pos - 1] < v:  # only strictly smaller ones move down
                if pos < k:
                    val[i, pos] = val[i, pos - 1]
                    idx[i, pos] = idx[i, pos - 1]
                pos -= 1
            val[i, pos] = v
            idx[i, pos] = j
            if filled < k:
                filled += 1


_TOP2_SIGNATURE: Final = (
    "void(float32[:, ::1], float32, int64[::1], float32[::1], float32[::1], float32[::1],"
    " int64[::1])"
)
_BEST_K_SIGNATURE: Final = "void(float32[:, ::1], int64[:, ::1], float32[:, ::1])"
_top2 = compile_kernel(_top2_py, signature=_TOP2_SIGNATURE)
_best_k = compile_kernel(_best_k_py, signature=_BEST_K_SIGNATURE)


def top2(
    m: NDArray[Any], threshold: float = math.inf
) -> tuple[
    NDArray[np.int64], NDArray[np.float32], NDArray[np.float32], NDArray[np.float32], NDArray[Any]
]:
    """For each row of ``m`` (float32, at least one column): the first column of its maximum,
    the maximum, the maximum of the other columns (-inf with one column), the minimum, and
    how many entries are at least ``threshold`` (compared in float32)."""
    a = np.ascontiguousarray(m, dtype=np.float32)
    if a.ndim != 2 or a.shape[1] == 0:
        raise ValueError(f"m must be a matrix with at least one column, got shape {a.shape}")
    n = a.shape[0]
    best = np.empty(n, dtype=np.int64)
    top = np.empty(n, dtype=np.float32)
    runner = np.empty(n, dtype=np.float32)
    low = np.empty(n, dtype=np.float32)
    above = np.empty(n, dtype=np.int64)
    _top2(a, np.float32(threshold), best, top, runner, low, above)
    return best, top, runner, low, above


def best_k(m: NDArray[Any], k: int) -> tuple[NDArray[np.int64], NDArray[np.float32]]:
    """The columns and values of the ``k`` largest entries of each row of ``m`` (float32),
    largest first and equal values by column: ``np.argsort(-m, kind="stable")[:, :k]`` and
    its values, without sorting the rows."""
    a = np.ascontiguousarray(m, dtype=np.float32)
    if a.ndim != 2 or not 1 <= k <= a.shape[1]:
        raise ValueError(f"k must be from 1 to the {a.shape[-1]} columns, got {k}")
    idx = np.empty((a.shape[0], k), dtype=np.int64)
    val = np.empty((a.shape[0], k), dtype=np.float32)
    _best_k(a, idx, val)
    return idx, val
