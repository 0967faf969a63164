"""Concurrent single-cue recalls on one collection share one matrix product.

A single cue streams the whole weight or pattern matrix for a handful of useful flops; a batch
of cues turns the same pass into a matrix product. Recall requests wait on the event loop, not
on threads: the first request for an idle collection starts a run in the thread pool after a
few turns of the event loop (no timer), and the requests that arrive while it runs queue up and
go together in the next run. Under light load every cue runs alone with no added delay but
those turns; under heavy load batches grow by themselves, and a request never waits more than
one run before its own starts.

The turns matter under load: requests the sockets have already received are still being parsed
and carried through the middleware when a run would start, so without them each run took about
half the connections and the other half waited a whole run. Each turn reads what has arrived
and moves the handlers on to their submit. Measured on 2 cores with 2 workers at 16 concurrent
connections (``cuebank bench``'s single-cue figure): about 2,200 requests/s with no turns,
3,000 to 3,400 with four; more turns gained nothing.

Groups are keyed by everything that must be equal for cues to share a run (team, collection,
options). The run answers each cue separately: one caller's invalid cue is refused alone.

Examples
--------
>>> import asyncio
>>> queue = RecallQueue(lambda key, cues: [len(c) for c in cues], max_batch=8)
>>> async def two() -> list[int]:
...     return list(await asyncio.gather(queue.submit("k", "ab"), queue.submit("k", "abc")))
>>> asyncio.run(two()), queue.runs, queue.cues_run
([2, 3], 1, 2)
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Hashable, Sequence
from typing import Any, Final, Generic, TypeVar

import anyio.to_thread

from .engine_threads import EngineThreads

__all__ = ["GATHER_TURNS", "RecallQueue"]

#: Event-loop turns a run waits for requests already received to join it (see the module).
GATHER_TURNS: Final = 4

K = TypeVar("K", bound=Hashable)
R = TypeVar("R")


class RecallQueue(Generic[K, R]):
    """Groups concurrent submissions with equal keys into runs of ``run(key, cues)``.

    Parameters
    ----------
    run : callable
        ``run(key, cues)`` returns one entry per cue, in order: a result, or an exception to
        raise in that cue's caller alone. An exception *raised* by ``run`` reaches every
        caller of the run. It is called in the thread pool, one run per key at a time.
    max_batch : int
        The most cues in one run (counted by ``size``); the rest wait for the next. A run
        always takes at least one submission, however large.
    threads : EngineThreads, optional
        The threads the runs go to (shared with whatever else runs there, which bounds the
        runs at once); by default anyio's worker threads.
    gather_turns : int
        Event-loop turns before each run, for requests already received to join it.
    size : callable, optional
        How many cues a submission counts for (default one): a queue of whole batches
        counts their cues.

    Attributes
    ----------
    runs, cues_run : int
        Counters, for the tests and the bench.
    """

    def __init__(
        self,
        run: Callable[[K, Sequence[Any]], Sequence[R | BaseException]],
        max_batch: int,
        threads: EngineThreads | None = None,
        gather_turns: int = GATHER_TURNS,
        size: Callable[[Any], int] | None = None,
    ) -> None:
        if max_batch < 1:
            raise ValueError(f"max_batch must be at least 1, got {max_batch}")
        if gather_turns < 0:
            raise ValueError(f"gather_turns must be at least 0, got {gather_turns}")
        self.gather_turns = gather_turns
        self._run = run
        self._threads = threads
        self.max_batch = max_batch
        self._size = size
        self._waiting: dict[K, list[tuple[Any, asyncio.Future[R]]]] = {}
        self._busy: set[K] = set()
        self._tasks: set[asyncio.Task[None]] = set()  # held, or a running drain could be lost
        self.runs = 0
        self.cues_run = 0

    async def submit(self, key: K, cue: Any) -> R:
        """Queue ``cue`` under ``key`` and wait for its own answer."""
        future: asyncio.Future[R] = asyncio.get_running_loop().create_future()
        self._waiting.setdefault(key, []).append((cue, future))
        if key not in self._busy:
            self._start(key)
        return await future

    def _cues(self, waiting: list[tuple[Any, asyncio.Future[R]]]) -> int:
        """The cues ``waiting`` counts for."""
        if self._size is None:
            return len(waiting)
        return sum(self._size(cue) for cue, _ in waiting)

    def _taken(self, waiting: list[tuple[Any, asyncio.Future[R]]]) -> int:
        """How many of ``waiting`` the next run takes: as many as fit in ``max_batch``, and
        at least one."""
        if self._size is None:
            return min(len(waiting), self.max_batch)
        total = 0
        for i, (cue, _) in enumerate(waiting):
            total += self._size(cue)
            if total > self.max_batch:
                return max(i, 1)
        return len(waiting)

    def _start(self, key: K) -> None:
        self._busy.add(key)
        task = asyncio.get_running_loop().create_task(self._drain(key))
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    async def _drain(self, key: K) -> None:
        try:
            while self._waiting.get(key):
                for _ in range(self.gather_turns):
                    if self._cues(self._waiting[key]) >= self.max_batch:
                        break  # a full run is waiting
                    await asyncio.sleep(0)  # one turn: arrived requests move on to submit
                waiting = self._waiting.pop(key)
                taken = self._taken(waiting)
                batch, rest = waiting[:taken], waiting[taken:]
                if rest:
                    self._waiting[key] = rest
                live = [(cue, f) for cue, f in batch if not f.done()]  # callers gone: skip
                if not live:
                    continue
                try:
                    cues = [cue for cue, _ in live]
                    answers = await (
                        anyio.to_thread.run_sync(self._run, key, cues)
                        if self._threads is None
                        else self._threads.run(self._run, key, cues)
                    )
                except BaseException as exc:  # every caller of the run must learn of it
                    for _, future in live:
                        if not future.done():
                            future.set_exception(exc)
                    if isinstance(exc, asyncio.CancelledError):
                        raise
                    continue
                self.runs += 1
                self.cues_run += len(live)
                for (_, future), answer in zip(live, answers, strict=True):
                    if future.done():
                        continue
                    if isinstance(answer, BaseException):
                        future.set_exception(answer)
                    else:
                        future.set_result(answer)
        finally:
            self._busy.discard(key)
            # left by a cancelled drain: hand the waiting cues to a new one
            if self._waiting.get(key):
                self._start(key)
