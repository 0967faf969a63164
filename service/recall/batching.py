"""Micro-batching: concurrent single-cue recalls on one compiled memory share one product.

A single cue streams the whole weight or pattern matrix for a handful of useful flops; a batch
of cues turns the same pass into a matrix product. Requests arrive on different threads, so the
first one to reach an empty slot becomes the *leader*: it waits a short window for others with
the same key (same compiled memory and options), then runs them all as one batch and hands each
caller its own row. Everything a cue could be refused for is checked before it joins, so one
caller's bad cue never fails the others.

Examples
--------
>>> import numpy as np
>>> batcher = RecallBatcher(max_batch=8)
>>> batcher.submit("k", np.array([1, -1]), lambda m: [int(r.sum()) for r in m], window=0.0)
0
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Hashable
from typing import Any, Generic, TypeVar

import numpy as np

__all__ = ["RecallBatcher"]

R = TypeVar("R")


class _Batch(Generic[R]):
    def __init__(self) -> None:
        self.rows: list[np.ndarray] = []
        self.closed = False
        self.full = threading.Event()
        self.done = threading.Event()
        self.results: list[R] = []
        self.error: BaseException | None = None


class RecallBatcher:
    """Groups concurrent submissions with equal keys into one call of ``run``.

    Parameters
    ----------
    max_batch : int
        A batch that reaches this size runs at once instead of waiting out its window.

    Attributes
    ----------
    batches_run, rows_run : int
        Counters, for the bench and the tests.
    """

    def __init__(self, max_batch: int = 64) -> None:
        self.max_batch = max_batch
        self._lock = threading.Lock()
        self._open: dict[Hashable, _Batch[Any]] = {}
        self.batches_run = 0
        self.rows_run = 0

    def submit(
        self,
        key: Hashable,
        row: np.ndarray,
        run: Callable[[np.ndarray], list[R]],
        window: float,
    ) -> R:
        """Add ``row`` to the open batch for ``key`` (or open one) and return its result.

        ``run`` takes the stacked rows and returns one result per row, in order; only the
        leader's ``run`` is called. An exception from ``run`` is raised in every caller.
        """
        with self._lock:
            batch = self._open.get(key)
            leader = batch is None
            if batch is None:
                batch = _Batch()
                self._open[key] = batch
            index = len(batch.rows)
            batch.rows.append(row)
            if len(batch.rows) >= self.max_batch:
                batch.closed = True
                del self._open[key]
                batch.full.set()
        if not leader:
            batch.done.wait()
        else:
            if window > 0:
                batch.full.wait(window)
            with self._lock:
                if not batch.closed:
                    batch.closed = True
                    del self._open[key]
                rows = list(batch.rows)
            try:
                batch.results = run(np.stack(rows))
                self.batches_run += 1
                self.rows_run += len(rows)
            except BaseException as exc:  # every waiter must learn of it, not only the leader
                batch.error = exc
            finally:
                batch.done.set()
        if batch.error is not None:
            raise batch.error
        result: R = batch.results[index]
        return result
