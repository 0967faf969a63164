"""The engine's thread pool (``service.api.engine_threads.EngineThreads``)."""

from __future__ import annotations

import asyncio
import threading
import time

import pytest

from service.api.engine_threads import EngineThreads

pytestmark = pytest.mark.anyio


async def test_a_run_gives_its_result_and_raises_its_error() -> None:
    threads = EngineThreads(1)
    try:
        assert await threads.run(pow, 2, 10) == 1024
        with pytest.raises(ZeroDivisionError):
            await threads.run(divmod, 1, 0)
    finally:
        threads.close()


async def test_no_more_runs_at_once_than_threads() -> None:
    threads = EngineThreads(2)
    lock = threading.Lock()
    now = [0]
    most = [0]

    def work() -> None:
        with lock:
            now[0] += 1
            most[0] = max(most[0], now[0])
        time.sleep(0.02)
        with lock:
            now[0] -= 1

    try:
        await asyncio.wait_for(asyncio.gather(*(threads.run(work) for _ in range(8))), 5.0)
    finally:
        threads.close()
    assert most[0] == 2


async def test_a_cancelled_caller_stops_waiting_and_the_next_run_still_goes() -> None:
    threads = EngineThreads(1)
    gate = threading.Event()
    try:
        held = asyncio.ensure_future(threads.run(gate.wait, 5.0))
        await asyncio.sleep(0.02)  # the run is in the thread, held at the gate
        held.cancel()
        with pytest.raises(asyncio.CancelledError):
            await asyncio.wait_for(held, 1.0)  # at once, not when the gate opens
        gate.set()
        assert await asyncio.wait_for(threads.run(len, "abc"), 5.0) == 3
    finally:
        threads.close()


def test_the_count_must_be_positive() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        EngineThreads(0)
