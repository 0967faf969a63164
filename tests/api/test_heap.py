"""The heap freezer: what it freezes is still reclaimed in the end (service/api/heap.py)."""

from __future__ import annotations

import gc
import itertools
import weakref

from service.api.heap import HeapFreezer


class Node:
    """Something that can sit in a reference cycle."""

    other: object = None


def test_a_cycle_frozen_while_alive_is_reclaimed_at_the_next_thaw() -> None:
    moves = itertools.count()  # the cache "moves" before every run
    freezer = HeapFreezer(lambda: next(moves), min_interval=0.0, thaw_every=2)
    try:
        node = Node()
        node.other = node
        alive = weakref.ref(node)
        assert freezer.after_run()  # frozen while alive
        del node
        gc.collect()
        assert alive() is not None, "frozen: the collector must not have seen it"
        assert freezer.after_run()  # the second freeze thaws first
        assert alive() is None
    finally:
        gc.unfreeze()


def test_freezes_wait_out_the_interval_and_skip_runs_that_changed_nothing() -> None:
    generations = iter([0, 0, 1, 2, 3])
    clock = iter([50.0, 60.0, 100.0])
    freezer = HeapFreezer(lambda: next(generations), min_interval=30.0, clock=lambda: next(clock))
    try:
        # unchanged; first change (frozen at once); too soon after it; 50 s later
        assert [freezer.after_run() for _ in range(4)] == [False, True, False, True]
        assert freezer.freezes == 2
    finally:
        gc.unfreeze()
