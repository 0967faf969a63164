"""Keep the cyclic garbage collector away from the compiled memories.

A compiled collection is a few large arrays and many small Python objects (its keys, its
stored fields, its candidate values): tens of thousands of objects that live as long as the
worker. CPython's cyclic collector walks every tracked object of a generation it collects, and
walking those was the long tail of single-cue recall latency (measured with ``cuebank bench
--sections d``: p99 16–26 ms with the collector on, 9 ms with it off). ``gc.freeze()`` moves
every object alive at that moment into a permanent generation the collector skips; reference
counting still frees them when their last reference goes.

The catch: an object frozen while alive that later becomes part of unreachable cycle (a
request in flight on another thread, a replaced compiled memory) is never collected. So
freezes follow a collection, come at most once per ``min_interval`` seconds, and every
``thaw_every``-th one first thaws everything so that a full collection reclaims such cycles:
what can be lost is bounded by what ``thaw_every`` freezes leave behind.

Examples
--------
>>> generation, clock = iter([0, 1, 1, 2, 3]), iter([100.0, 110.0, 200.0])
>>> freezer = HeapFreezer(lambda: next(generation), min_interval=30.0, clock=lambda: next(clock))
>>> [freezer.after_run() for _ in range(4)]  # new, same, too soon, new
[True, False, False, True]
"""

from __future__ import annotations

import gc
import math
import threading
import time
from collections.abc import Callable

__all__ = ["HeapFreezer"]


class HeapFreezer:
    """Collects and freezes the heap after a run whenever ``generation()`` has moved.

    ``generation`` is read at construction (which freezes once) and after each run. Safe to
    call from several threads.
    """

    def __init__(
        self,
        generation: Callable[[], int],
        *,
        min_interval: float = 30.0,
        thaw_every: int = 10,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._generation = generation
        self._min_interval = min_interval
        self._thaw_every = thaw_every
        self._clock = clock
        self._lock = threading.Lock()
        self._seen = generation()
        self._last = -math.inf  # the first compile after start-up is frozen at once
        self.freezes = 0
        _collect_and_freeze(thaw=False)

    def after_run(self) -> bool:
        """Freeze if the cache holds something new and the last freeze is old enough; return
        whether it did."""
        current = self._generation()
        with self._lock:
            if current == self._seen:
                return False
            now = self._clock()
            if now - self._last < self._min_interval:
                return False
            self._seen, self._last = current, now
            self.freezes += 1
            thaw = self.freezes % self._thaw_every == 0
        _collect_and_freeze(thaw=thaw)
        return True


def _collect_and_freeze(*, thaw: bool) -> None:
    if thaw:
        gc.unfreeze()  # a full collection then sees every object again
    gc.collect()
    gc.freeze()
