"""Verdicts: recalled; spurious (reversed, mixture, far, ambiguous); unsettled (cycle, limit)."""

from __future__ import annotations

import math
from collections.abc import Callable
from itertools import pairwise

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.typing import NDArray

from service.engine import (
    HebbianRule,
    SettleResult,
    VerdictThresholds,
    chance_ceiling,
    judge,
    settle,
)
from service.engine.errors import ParameterError
from service.engine.verdict import field_agreement

PatternMaker = Callable[[int, int], NDArray[np.int8]]
RuleWithWeights = Callable[..., HebbianRule]


def settled_at(states: NDArray[np.int8]) -> SettleResult:
    """A result that says each state is a fixed point, to judge states made by hand."""
    b = states.shape[0]
    return SettleResult(
        states=states.astype(np.int8),
        steps=np.ones(b, dtype=np.int64),
        converged=np.ones(b, dtype=bool),
        cycle_length=np.zeros(b, dtype=np.int64),
    )


class TestJudge:
    def test_a_noisy_cue_that_settles_on_its_memory_is_recalled(
        self, random_patterns: PatternMaker, rng: np.random.Generator
    ) -> None:
        X = random_patterns(20, 500)
        cues = X[:5].copy()
        cues[:, :200] = 0  # 40 % of the units unknown
        cues[:, 200:250] *= -1  # and 50 of the rest wrong
        result = settle(HebbianRule().fit(X), cues)
        batch = judge(X, cues, result, top_k=3)
        assert batch.verdict == ["recalled"] * 5
        assert batch.reason == ["clean"] * 5
        np.testing.assert_array_equal(batch.best, np.arange(5))
        np.testing.assert_array_equal(batch.nearest[:, 0], np.arange(5))
        np.testing.assert_allclose(batch.overlap, 1.0)
        assert (np.diff(batch.nearest_overlap, axis=1) <= 0).all()
        one = batch[2]
        assert one.verdict == "recalled"
        assert one.nearest[0] == (2, 1.0)
        assert one.cue_agreement == pytest.approx(1 - 2 * 50 / 300)

    def test_the_symmetric_three_mixture_is_spurious_as_a_mixture(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(10, 1000)
        mixture = np.sign(X[:3].sum(axis=0)).astype(np.int8)[None, :]
        batch = judge(X, mixture, settle(HebbianRule().fit(X), mixture))
        # Source: Amit, Gutfreund & Sompolinsky (1985): overlap ½ with each of three memories
        assert (batch.verdict[0], batch.reason[0]) == ("spurious", "mixture")
        assert set(batch.nearest[0]) == {0, 1, 2}
        assert batch.overlap[0] < batch.thresholds["recall_overlap"][0]

    def test_a_reversed_memory_is_spurious_as_reversed(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(10, 500)
        cues = -X[:2]
        batch = judge(X, cues, settle(HebbianRule().fit(X), cues))
        # Source: Hopfield (1982): −ξ is an attractor whenever ξ is
        assert batch.verdict == ["spurious", "spurious"]
        assert batch.reason == ["reversed", "reversed"]

    def test_a_two_cycle_is_unsettled_with_reason_cycle(
        self, rule_with_weights: RuleWithWeights
    ) -> None:
        rule = rule_with_weights([[0.0, -1.0], [-1.0, 0.0]], patterns=[[1, -1]])
        result = settle(rule, [[1, 1]])
        batch = judge(rule.patterns_, [[1, 1]], result)
        # Source: Goles-Chacc, Fogelman-Soulié & Pellegrin (1985)
        assert (batch.verdict[0], batch.reason[0]) == ("unsettled", "cycle")
        assert batch[0].cycle_length == 2
        assert not batch[0].converged

    def test_hitting_the_step_limit_is_unsettled_with_reason_step_limit(
        self, rule_with_weights: RuleWithWeights
    ) -> None:
        rule = rule_with_weights([[0.0, -1.0], [-1.0, 0.0]], patterns=[[1, -1]])
        result = settle(rule, [[1, 1]], max_steps=1)
        batch = judge(rule.patterns_, [[1, 1]], result)
        assert (batch.verdict[0], batch.reason[0]) == ("unsettled", "step_limit")

    def test_a_cue_matching_two_memories_equally_is_spurious_as_ambiguous(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(6, 400)
        X[1, :200] = X[0, :200]  # two records that agree on the first half
        cue = X[:1].copy()
        cue[0, 200:] = 0  # the caller knows only the shared half
        batch = judge(X, cue, settle(HebbianRule().fit(X), cue, clamp=True))
        assert batch.cue_margin[0] == 0.0
        assert (batch.verdict[0], batch.reason[0]) == ("spurious", "ambiguous")

    def test_a_state_unrelated_to_every_memory_is_spurious_as_far(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(50, 1000)
        state = random_patterns(1, 1000)
        batch = judge(X, state, settled_at(state))
        assert (batch.verdict[0], batch.reason[0]) == ("spurious", "far")
        # Gaussian extreme value of 50 chance overlaps: ≈ √(2 ln 50 / N) ≈ 0.09
        assert batch.overlap[0] < chance_ceiling(50, 1000)

    def test_a_memory_that_contradicts_the_cue_is_spurious_as_far(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(10, 400)
        cue = np.zeros((1, 400), dtype=np.int8)
        cue[0, :100] = -X[0, :100]  # the fragment says the opposite of memory 0
        batch = judge(X, cue, settled_at(X[:1]))
        assert batch.cue_agreement[0] == -1.0
        assert (batch.verdict[0], batch.reason[0]) == ("spurious", "far")

    def test_default_thresholds_follow_the_chance_level(self) -> None:
        th = VerdictThresholds()
        # common practice, no published source: θ_m = clip(1 − 10/√N, 0.7, 0.95)
        assert th.resolved_recall_overlap(256) == 0.7
        assert th.resolved_recall_overlap(10_000) == pytest.approx(0.9)
        assert th.resolved_recall_overlap(1_000_000) == 0.95
        # the largest of P chance overlaps ≈ √(2 ln P / n), plus 3 SE
        assert chance_ceiling(100, 1000) == pytest.approx(
            math.sqrt(2 * math.log(200) / 1000) + 3 / math.sqrt(1000)
        )

    def test_thresholds_given_by_the_caller_replace_the_defaults(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(8, 300)
        state = X[:1].copy()
        state[0, :30] *= -1  # overlap 0.8
        strict = VerdictThresholds(recall_overlap=0.9)
        assert judge(X, X[:1], settled_at(state)).verdict == ["recalled"]
        assert judge(X, X[:1], settled_at(state), strict).reason == ["far"]
        loose_cue = VerdictThresholds(min_cue_margin=1.5)
        assert judge(X, X[:1], settled_at(X[:1]), loose_cue).reason == ["ambiguous"]
        batch = judge(X, X[:1], settled_at(X[:1]), VerdictThresholds(min_agreement=0.5))
        assert batch.thresholds["min_agreement"][0] == 0.5

    def test_top_k_is_capped_at_the_number_of_memories(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(2, 64)
        batch = judge(X, X, settled_at(X), top_k=5)
        assert batch.nearest.shape == (2, 2)
        np.testing.assert_array_equal(batch.nearest[:, 0], [0, 1])


class TestJudgeGivenTheRule:
    def test_passing_the_fitted_rule_gives_the_same_verdicts_as_its_patterns(self) -> None:
        from service.engine import DenseRule, judge, settle

        rng = np.random.default_rng(5)
        X = np.where(rng.random((200, 128)) < 0.5, -1, 1).astype(np.int8)
        rule = DenseRule().fit(X)
        cues = X[:40].copy()
        cues[:, :30] = 0
        res = settle(rule, cues)
        a = judge(rule, cues, res)
        b = judge(rule.patterns_, cues, res)
        assert a.verdict == b.verdict
        assert np.array_equal(a.best, b.best)
        assert np.allclose(a.overlap, b.overlap)
        assert np.allclose(a.cue_margin, b.cue_margin)

    def test_an_unfitted_rule_is_an_engine_error(self) -> None:
        from service.engine import DenseRule, EngineError, judge, settle

        fitted = DenseRule().fit(np.ones((1, 8), dtype=np.int8))
        res = settle(fitted, np.ones((1, 8), dtype=np.int8))
        with pytest.raises(EngineError):
            judge(DenseRule(), np.ones((1, 8), dtype=np.int8), res)


@settings(max_examples=60, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_rows=st.integers(1, 9),
    cuts=st.lists(st.integers(1, 40), min_size=1, max_size=5),
)
def test_field_agreement_is_the_least_agreement_over_each_known_block(
    seed: int, n_rows: int, cuts: list[int]
) -> None:
    # Reference: the definition, block by block in plain Python
    rng = np.random.default_rng(seed)
    bounds = np.cumsum([0, *cuts])
    blocks = [slice(int(a), int(b)) for a, b in pairwise(bounds)]
    rng.shuffle(blocks)
    n = int(bounds[-1])
    states = rng.choice(np.array([-1.0, 1.0], dtype=np.float32), size=(n_rows, n))
    cues = rng.choice(np.array([-1.0, 0.0, 1.0], dtype=np.float32), size=(n_rows, n))
    cues[rng.random(n_rows) < 0.3] = 0.0  # some cues know nothing at all
    got = field_agreement(states, cues, blocks)
    for i in range(n_rows):
        per_block = [
            sum(float(s) * float(c) for s, c in zip(states[i, b], cues[i, b], strict=True))
            / np.count_nonzero(cues[i, b])
            for b in blocks
            if np.count_nonzero(cues[i, b])
        ]
        assert got[i] == (min(per_block) if per_block else 1.0)


def test_field_agreement_reads_open_slices_and_refuses_strided_ones() -> None:
    s = np.array([[1, 1, 1, 1]], dtype=np.float32)
    c = np.array([[1, -1, 1, 1]], dtype=np.float32)
    # slice(None, 2) is units 0 and 1: agreement 0; slice(2, None) agrees fully
    assert field_agreement(s, c, [slice(None, 2), slice(2, None)]).tolist() == [0.0]
    with pytest.raises(ParameterError, match="contiguous"):
        field_agreement(s, c, [slice(0, 4, 2)])
