"""Fixtures for the engine tests: a seeded generator and helpers that build patterns and rules.

Helpers are handed out as fixtures rather than imported, because the suite runs with
``--import-mode=importlib``, under which a conftest is not an importable module.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from numpy.typing import NDArray

from service.engine import HebbianRule

PatternMaker = Callable[[int, int], NDArray[np.int8]]


@pytest.fixture
def rng() -> np.random.Generator:
    """A generator with a fixed seed, so every statistical check sees the same draw."""
    return np.random.default_rng(20240611)


def draw_patterns(rng: np.random.Generator, n_memories: int, n_units: int) -> NDArray[np.int8]:
    """Independent unbiased ±1 patterns, shape (n_memories, n_units)."""
    return np.where(rng.random((n_memories, n_units)) < 0.5, -1, 1).astype(np.int8)


@pytest.fixture
def random_patterns(rng: np.random.Generator) -> PatternMaker:
    """``random_patterns(n_memories, n_units)`` draws from the test's seeded generator."""

    def make(n_memories: int, n_units: int) -> NDArray[np.int8]:
        return draw_patterns(rng, n_memories, n_units)

    return make


class FixedWeightsRule(HebbianRule):
    """A matrix rule whose recall weights are given outright instead of learned.

    The dynamics only need ``patterns_`` (for N), the weight matrix and its scale, so a
    hand-written W can be driven through the same code path as a fitted rule.
    """

    def __init__(self, weights: Any, patterns: Any | None = None) -> None:
        w = np.asarray(weights, dtype=np.float32)
        n = w.shape[0]
        self._w = np.ascontiguousarray(w)
        self._scale = 1.0
        self.patterns_ = (
            np.ones((1, n), dtype=np.int8)
            if patterns is None
            else np.asarray(patterns, dtype=np.int8).reshape(-1, n)
        )


@pytest.fixture
def rule_with_weights() -> Callable[..., FixedWeightsRule]:
    """``rule_with_weights(W, patterns=None)`` gives a rule that recalls with exactly W."""
    return FixedWeightsRule
