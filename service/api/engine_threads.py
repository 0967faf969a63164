"""The threads that run recalls, fed from one queue.

A recall is milliseconds of numpy work, so it runs off the event loop. Handing each run to a
thread through anyio (a capacity limiter, cancellation checkpoints, a worker picked per call)
cost about 0.11 ms of CPU a hand-off on the 2-core development machine, a sizeable part of
what the event loop spends on a batch request. Here a fixed pool of threads takes runs from
one queue (the standard library's executor) and the caller awaits the run's future: the
bound on runs at once is the pool's size, and a thread that finishes one run takes the next
without waiting for the event loop.

Examples
--------
>>> import asyncio
>>> threads = EngineThreads(1)
>>> asyncio.run(threads.run(sum, [1, 2, 3]))
6
>>> threads.close()
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, TypeVar

__all__ = ["EngineThreads"]

T = TypeVar("T")


class EngineThreads:
    """A fixed number of threads for engine runs, shared by both recall calls.

    Parameters
    ----------
    count : int
        Runs at once. Their Python parts hold the GIL, so more than the worker's share of
        cores only contend (see the ``engine_threads`` setting).

    Notes
    -----
    A caller cancelled while its run is in a thread stops waiting at once; the run finishes
    in its thread and its result is dropped (a recall changes nothing). A run not yet started
    when its caller is cancelled never starts.
    """

    def __init__(self, count: int) -> None:
        if count < 1:
            raise ValueError(f"count must be at least 1, got {count}")
        self.count = count
        self._pool = ThreadPoolExecutor(max_workers=count, thread_name_prefix="cuebank-engine")

    async def run(self, function: Callable[..., T], *args: Any) -> T:
        """``function(*args)`` in one of the threads: its result, or its exception raised."""
        return await asyncio.wrap_future(self._pool.submit(function, *args))

    def close(self) -> None:
        """Let the runs already queued finish, then stop the threads."""
        self._pool.shutdown(wait=True)
