"""Keep the cyclic garbage collector away from the compiled memories.

A compiled collection is a few large arrays and many small Python objects (its keys, its
stored fields, its candidate values): tens of thousands of objects that live as long as the
worker. CPython's cyclic collector walks every tracked object of a generation it collects, and
walking those was the long tail of single-cue recall latency (measured with ``cuebank bench
--sections d``: p99 16–26 ms with the collector on, 9 ms with it off). ``gc.freeze()`` moves
every object alive at that moment into a permanent generation the collector skips; reference
counting still frees them when their last reference goes. Freezing after each new compile,
and once at start-up, keeps the walks to the objects requests create. Each freeze follows a
collection, so no cycle that is already garbage gets frozen; that collection only walks what
the last freeze left out, so it is short.

Examples
--------
>>> generation = iter([0, 1, 1, 2])
>>> freezer = HeapFreezer(lambda: next(generation))
>>> [freezer.after_run() for _ in range(3)]
[True, False, True]
"""

from __future__ import annotations

import gc
import threading
from collections.abc import Callable

__all__ = ["HeapFreezer"]


class HeapFreezer:
    """Calls ``gc.freeze()`` after a run whenever ``generation()`` has moved since the last.

    ``generation`` is read once at construction (with a freeze then too) and after each run.
    Safe to call from several threads.
    """

    def __init__(self, generation: Callable[[], int]) -> None:
        self._generation = generation
        self._lock = threading.Lock()
        self._seen = generation()
        _collect_and_freeze()

    def after_run(self) -> bool:
        """Freeze if the cache holds something new; return whether it did."""
        current = self._generation()
        with self._lock:
            if current == self._seen:
                return False
            self._seen = current
        _collect_and_freeze()
        return True


def _collect_and_freeze() -> None:
    gc.collect()
    gc.freeze()
