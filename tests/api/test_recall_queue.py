"""Concurrent single-cue recalls share one run (``service.api.batching.RecallQueue``)."""

from __future__ import annotations

import asyncio
import gc
import threading
from collections.abc import Sequence
from typing import Any

import httpx
import pytest

from service.api.batching import RecallQueue

from .conftest import BASE, SEED

pytestmark = pytest.mark.anyio


class Recorder:
    """A run that doubles each cue and remembers the batches it was given."""

    def __init__(self, gate: threading.Event | None = None) -> None:
        self.batches: list[list[Any]] = []
        self.gate = gate

    def __call__(self, key: str, cues: Sequence[Any]) -> list[Any]:
        if self.gate is not None:
            assert self.gate.wait(5.0), "the test never opened the gate"
        self.batches.append(list(cues))
        return [ValueError(f"bad {c}") if c < 0 else (key, 2 * c) for c in cues]


async def test_a_lone_cue_runs_at_once_and_gets_its_answer() -> None:
    queue = RecallQueue(Recorder(), max_batch=8)
    assert await asyncio.wait_for(queue.submit("k", 4), 5.0) == ("k", 8)
    assert (queue.runs, queue.cues_run) == (1, 1)


@pytest.mark.parametrize("turns", [0, 2, 4])
async def test_cues_arriving_within_the_gathering_turns_share_the_first_run(turns: int) -> None:
    # a cue submitted k loop turns after the first joins its run when k < gather_turns;
    # with no turns each cue that finds the queue idle starts its own run
    run = Recorder()
    queue = RecallQueue(run, max_batch=8, gather_turns=turns)
    first = asyncio.ensure_future(queue.submit("k", 0))
    await asyncio.sleep(0)  # the first submit is queued and its drain scheduled
    second = asyncio.ensure_future(queue.submit("k", 1))
    assert await asyncio.wait_for(asyncio.gather(first, second), 5.0) == [("k", 0), ("k", 2)]
    assert run.batches == ([[0, 1]] if turns >= 2 else [[0], [1]])


async def test_gathering_stops_once_a_run_is_full() -> None:
    run = Recorder()
    queue = RecallQueue(run, max_batch=2, gather_turns=1000)
    answers = await asyncio.wait_for(asyncio.gather(*(queue.submit("k", i) for i in range(5))), 5.0)
    assert answers == [("k", 2 * i) for i in range(5)]
    assert run.batches == [[0, 1], [2, 3], [4]]


async def test_cues_arriving_during_a_run_go_together_in_the_next() -> None:
    gate = threading.Event()
    run = Recorder(gate)
    queue = RecallQueue(run, max_batch=64)
    first = asyncio.ensure_future(queue.submit("k", 0))
    await asyncio.sleep(0.05)  # the first run is under way, held at the gate
    rest = [asyncio.ensure_future(queue.submit("k", i)) for i in range(1, 9)]
    await asyncio.sleep(0.05)
    gate.set()
    answers = await asyncio.wait_for(asyncio.gather(first, *rest), 5.0)
    assert answers == [("k", 2 * i) for i in range(9)]
    assert run.batches == [[0], list(range(1, 9))]


async def test_runs_hold_at_most_max_batch_cues_and_keys_never_mix() -> None:
    gate = threading.Event()
    run = Recorder(gate)
    queue = RecallQueue(run, max_batch=3)
    first = asyncio.ensure_future(queue.submit("a", 100))
    await asyncio.sleep(0.05)
    waiting = [asyncio.ensure_future(queue.submit("a", i)) for i in range(7)]
    other = asyncio.ensure_future(queue.submit("b", 50))
    await asyncio.sleep(0.05)
    gate.set()
    await asyncio.wait_for(asyncio.gather(first, *waiting, other), 5.0)
    assert all(len(b) <= 3 for b in run.batches)
    assert sorted(c for b in run.batches for c in b) == sorted([100, 50, *range(7)])
    assert [50] in run.batches  # key "b" ran on its own
    assert other.result() == ("b", 100)


async def test_an_answer_that_is_an_error_reaches_its_caller_alone() -> None:
    queue = RecallQueue(Recorder(), max_batch=8)
    good, bad = await asyncio.gather(
        queue.submit("k", 1), queue.submit("k", -1), return_exceptions=True
    )
    assert good == ("k", 2)
    assert isinstance(bad, ValueError)
    assert str(bad) == "bad -1"


async def test_an_error_raised_by_the_run_reaches_every_caller() -> None:
    def broken(key: str, cues: Sequence[Any]) -> list[Any]:
        raise RuntimeError("settle failed")

    queue = RecallQueue(broken, max_batch=8)
    out = await asyncio.gather(*(queue.submit("k", i) for i in range(3)), return_exceptions=True)
    assert all(isinstance(o, RuntimeError) for o in out)
    # and the queue still works afterwards
    queue._run = Recorder()
    assert await asyncio.wait_for(queue.submit("k", 2), 5.0) == ("k", 4)


async def test_a_caller_that_leaves_does_not_hold_up_the_others() -> None:
    gate = threading.Event()
    run = Recorder(gate)
    queue = RecallQueue(run, max_batch=8)
    first = asyncio.ensure_future(queue.submit("k", 0))
    await asyncio.sleep(0.05)
    gone = asyncio.ensure_future(queue.submit("k", 1))
    stays = asyncio.ensure_future(queue.submit("k", 2))
    await asyncio.sleep(0)
    gone.cancel()
    gate.set()
    assert await asyncio.wait_for(stays, 5.0) == ("k", 4)
    await first
    assert 1 not in [c for b in run.batches for c in b]  # skipped, not run


async def test_sized_submissions_fill_a_run_up_to_max_batch_cues() -> None:
    # whole batches as submissions: a run takes as many as fit in max_batch cues, and a
    # batch larger than that still runs, alone
    gate = threading.Event()
    runs: list[list[list[int]]] = []

    def run(key: str, batches: Sequence[list[int]]) -> list[Any]:
        assert gate.wait(5.0)
        runs.append([list(b) for b in batches])
        return [sum(b) for b in batches]

    queue = RecallQueue(run, max_batch=8, size=len)
    first = asyncio.ensure_future(queue.submit("k", [0]))
    await asyncio.sleep(0.05)  # the first run is under way, held at the gate
    sizes = [3, 4, 2, 12, 5, 1]
    rest = [asyncio.ensure_future(queue.submit("k", [1] * n)) for n in sizes]
    await asyncio.sleep(0.05)
    gate.set()
    answers = await asyncio.wait_for(asyncio.gather(first, *rest), 5.0)
    assert answers == [0, *sizes]
    assert [[len(b) for b in r] for r in runs] == [[1], [3, 4], [2], [12], [5, 1]]


def test_max_batch_below_one_is_refused() -> None:
    with pytest.raises(ValueError, match="max_batch"):
        RecallQueue(Recorder(), max_batch=0)


async def test_concurrent_requests_share_runs_and_each_gets_its_own_answer(
    seeded: httpx.AsyncClient,
) -> None:
    app: Any = seeded._transport.app  # type: ignore[attr-defined]
    cues = [dict(list(fields.items())[:3]) for fields in SEED["memories"].values()]
    cues += [{"taxon": "Quercus robur"}, {"tide": "low"}]  # one spurious, one invalid
    alone = [
        await seeded.post(f"{BASE}/recall", json={"cue": c, "options": {"top_k": 2}}) for c in cues
    ] * 3
    runs_before = app.state.recall_queue.runs
    together = await asyncio.gather(
        *(seeded.post(f"{BASE}/recall", json={"cue": c, "options": {"top_k": 2}}) for c in cues * 3)
    )
    assert [r.status_code for r in together] == [r.status_code for r in alone]
    assert [r.json() for r in together] == [r.json() for r in alone]
    assert alone[-1].status_code == 422
    assert app.state.recall_queue.runs - runs_before < len(together)


async def test_a_new_compile_is_frozen_out_of_the_collectors_walks(
    seeded: httpx.AsyncClient,
) -> None:
    # the first recall compiles the collection: its objects leave the collector's walks
    # (service/api/heap.py); a recall that changes nothing freezes nothing
    cue = {"cue": {"taxon": "Zostera marina"}}
    before = gc.get_freeze_count()
    assert (await seeded.post(f"{BASE}/recall", json=cue)).status_code == 200
    after_compile = gc.get_freeze_count()
    assert after_compile > before
    assert (await seeded.post(f"{BASE}/recall", json=cue)).status_code == 200
    # (frozen objects still go when their last reference does, so the count may fall)
    assert gc.get_freeze_count() <= after_compile
