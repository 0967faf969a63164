"""Decoding settled states to field values: the shortcut for exact blocks changes no answer."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from service.demo import demo_records, demo_schema
from service.recall.compiled import CompiledMemory
from service.recall.models import CollectionSpec, DecodedField, RecallOptions
from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head


def _reference(
    compiled: CompiledMemory, states: np.ndarray, nearest: np.ndarray
) -> list[dict[str, DecodedField]]:
    """Every candidate value scored against every block; ties go to the nearest memory's."""
    out: list[dict[str, DecodedField]] = [{} for _ in range(states.shape[0])]
    sf = states.astype(np.float32)
    for name, cand in compiled.candidates.items():
        block = sf[:, compiled.codec.schema.slices[name]]
        d = block.shape[1]
        scores = block @ cand.codes().T / np.float32(d)
        ranked = scores.astype(np.float64)
        ranked[np.arange(len(block)), cand.of_memory[nearest]] += 1e-9
        for i, j in enumerate(np.argmax(ranked, axis=1)):
            m = float(scores[i, j])
            out[i][name] = DecodedField(
                cand.values[int(j)], round(m, 6), round(math.sqrt(d) * m, 3)
            )
    return out


def _compiled_demo(tmp_path: Path, seed: int, n: int) -> tuple[RecallService, CompiledMemory]:
    """A service over ``n`` demo specimens, and their collection compiled."""
    settings = Settings(data_dir=tmp_path)
    upgrade_to_head(settings.resolved_database_url)
    service = RecallService(
        settings, make_session_factory(make_engine(settings.resolved_database_url))
    )
    spec = CollectionSpec(name="s", schema=demo_schema(), seed=seed)
    service.create_collection(DEFAULT_TEAM, spec)
    records = demo_records(n=n)
    service.import_memories(
        DEFAULT_TEAM, "s", [(i, k, dict(f)) for i, (k, f) in enumerate(records)]
    )
    service.recall(DEFAULT_TEAM, "s", [dict(records[0][1])], RecallOptions())  # compiles
    [compiled] = list(service.cache._entries.values())
    return service, compiled


def test_decoding_matches_scoring_every_candidate(tmp_path: Path) -> None:
    service, compiled = _compiled_demo(tmp_path, seed=5, n=200)
    rng = np.random.default_rng(3)
    patterns = compiled.rule.patterns_
    n_mem, n_units = patterns.shape
    picks = rng.integers(0, n_mem, size=60)
    states = patterns[picks].astype(np.int8).copy()
    # exact memories (the shortcut), a few flipped units, a whole block replaced, random states
    states[20:40] *= np.where(rng.random((20, n_units)) < 0.03, -1, 1).astype(np.int8)
    states[40:50] = rng.choice(np.array([-1, 1], dtype=np.int8), size=(10, n_units))
    first = next(iter(compiled.codec.schema.slices.values()))
    states[50:60, first] = patterns[rng.integers(0, n_mem, size=10)][:, first]
    # the nearest memory need not be the one a state came from
    nearest = np.where(rng.random(60) < 0.7, picks, rng.integers(0, n_mem, size=60))
    expected = _reference(compiled, states, nearest)
    # states that are their nearest memory's pattern are not compared again: the same answers
    whole = (states == patterns[nearest]).all(axis=1)
    assert whole.sum() >= 5
    assert service._decode(compiled, states, nearest, whole) == expected
    assert service._decode(compiled, states, nearest, np.zeros(60, dtype=bool)) == expected


def test_every_memorys_pattern_is_its_own_values_codes_side_by_side(tmp_path: Path) -> None:
    # what lets a state equal to a memory's pattern skip decoding: each block of the pattern
    # is exactly the code of that memory's own value of the field
    _, compiled = _compiled_demo(tmp_path, seed=9, n=120)
    patterns = compiled.rule.patterns_
    for name, cand in compiled.candidates.items():
        block = patterns[:, compiled.codec.schema.slices[name]].astype(np.float32)
        np.testing.assert_array_equal(block, cand.codes(cand.of_memory), err_msg=name)
