"""Compiled memories and their cache.

A :class:`CompiledMemory` is everything a recall needs for one collection at one revision: the
fitted rule, the codec, the keys and fields of the memories in pattern order, the verdict
thresholds, and per field the codes of the candidate values used to decode a settled state.
It is derived data: built deterministically from the memories (same memories ⇒ bit-identical
weights and the same checksum), so it is cached in memory and rebuilt whenever the revision in
the database moves past it.

Incremental updates never mutate a compiled memory that a recall may be reading: they build a
new one (copy-on-write, O(N²) like the update itself) and swap it into the cache.
"""

from __future__ import annotations

import copy
import math
import threading
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.engine import MemoryRule, VerdictThresholds
from service.engine.bits import pack, packed_dots, unpack
from service.engine.codec import Codec

from .models import DecodedField, Fields


@dataclass
class FieldCandidates:
    """Distinct stored values of one field and their ±1 codes, packed one bit per unit.

    ``of_memory[i]`` is the index in ``values`` of memory i's value, used to break ties in
    favour of the value the nearest memory really holds (values within one tile of each other
    can share a code).
    """

    values: list[Any]
    bits: NDArray[np.uint8]  # (n_values, 8 ceil(units / 64)): whole words, see bits.pack
    units: int
    of_memory: NDArray[np.int64]
    # value index -> its DecodedField at score 1 (immutable, so one per value serves all)
    matched: dict[int, DecodedField] = field(default_factory=dict, repr=False, compare=False)

    def exact(self, j: int) -> DecodedField:
        """Value ``j`` decoded from a block that is exactly its code: score 1, z = √units."""
        found = self.matched.get(j)
        if found is None:
            found = self.matched[j] = DecodedField(
                value=self.values[j], score=1.0, z=round(math.sqrt(self.units), 3)
            )
        return found

    @classmethod
    def from_codes(
        cls, values: list[Any], codes: NDArray[np.int8], of_memory: NDArray[np.int64]
    ) -> FieldCandidates:
        """From the ±1 codes of ``values``, shape (n_values, units)."""
        return cls(values, pack(codes), int(codes.shape[1]), of_memory)

    def codes(self, rows: NDArray[np.intp] | None = None) -> NDArray[np.float32]:
        """The codes of ``rows`` of ``values`` (all when None) as float32, shape (rows, units)."""
        bits = self.bits if rows is None else self.bits[rows]
        return unpack(bits, self.units).astype(np.float32)

    def scores(self, blocks: NDArray[np.float32]) -> NDArray[np.float32]:
        """Overlap of each block with each value's code, shape (n_blocks, n_values), in [-1, 1]."""
        return packed_dots(blocks, self.bits, self.units) / np.float32(self.units)


@dataclass
class CompiledMemory:
    collection_id: int
    revision: int
    rule: MemoryRule
    codec: Codec
    keys: list[str]
    fields: list[Fields]
    index: dict[str, int]
    thresholds: VerdictThresholds
    calibrated_count: int
    candidates: dict[str, FieldCandidates]
    checksum: str
    report: dict[str, Any] = field(default_factory=dict)

    @property
    def nbytes(self) -> int:
        cand = sum(c.bits.nbytes + c.of_memory.nbytes for c in self.candidates.values())
        return int(self.rule.held_bytes_ + cand)

    def with_rule(self, **changes: Any) -> CompiledMemory:
        """A shallow copy with the given members replaced."""
        return replace(self, **changes)

    def copy_rule(self) -> MemoryRule:
        """A deep copy of the rule, safe to update while recalls read the original."""
        # Recalls on the original may add a lazily built member (the float32 patterns) at any
        # moment, and deepcopy walks the member dict in Python code, failing with "dictionary
        # changed size during iteration" when that happens mid-walk. dict() takes the members
        # in one step under the GIL; the walk then runs over that snapshot.
        members = dict(vars(self.rule))
        clone = object.__new__(type(self.rule))
        vars(clone).update(copy.deepcopy(members))
        return clone


class CompiledCache:
    """LRU cache of compiled memories keyed by collection id, bounded in bytes.

    Entries carry their revision; a reader checks it against the database before use. A lock
    per collection makes concurrent misses compile once.
    """

    def __init__(self, max_bytes: int) -> None:
        self.max_bytes = max_bytes
        self._entries: OrderedDict[int, CompiledMemory] = OrderedDict()
        self._lock = threading.Lock()
        self._compile_locks: dict[int, threading.Lock] = {}
        #: Counts the entries stored; moves whenever the cache holds something new.
        self.generation = 0

    def entries(self) -> list[CompiledMemory]:
        """The cached compiled memories, least recently used first (a snapshot)."""
        with self._lock:
            return list(self._entries.values())

    def get(self, collection_id: int) -> CompiledMemory | None:
        with self._lock:
            entry = self._entries.get(collection_id)
            if entry is not None:
                self._entries.move_to_end(collection_id)
            return entry

    def put(self, entry: CompiledMemory) -> None:
        with self._lock:
            current = self._entries.get(entry.collection_id)
            if current is not None and current.revision > entry.revision:
                return  # a newer compile landed first; keep it
            self._entries[entry.collection_id] = entry
            self._entries.move_to_end(entry.collection_id)
            self.generation += 1
            total = sum(e.nbytes for e in self._entries.values())
            while total > self.max_bytes and len(self._entries) > 1:
                _, dropped = self._entries.popitem(last=False)
                total -= dropped.nbytes

    def discard(self, collection_id: int) -> None:
        with self._lock:
            self._entries.pop(collection_id, None)

    def compile_lock(self, collection_id: int) -> threading.Lock:
        with self._lock:
            return self._compile_locks.setdefault(collection_id, threading.Lock())

    @property
    def total_bytes(self) -> int:
        with self._lock:
            return sum(e.nbytes for e in self._entries.values())

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)
