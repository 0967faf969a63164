"""The compiled-memory cache's copy of a rule, taken while recalls use the original."""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from service.engine import make_rule
from service.recall.compiled import CompiledMemory


class GrowsTheRuleWhenCopied:
    """A member whose copying adds a member to the rule, as a recall in another thread can."""

    def __init__(self, rule: Any) -> None:
        self.rule = rule

    def __deepcopy__(self, memo: dict[int, Any]) -> GrowsTheRuleWhenCopied:
        self.rule.added_meanwhile = True
        return self


def compiled_with(rule: Any) -> CompiledMemory:
    # Only the rule matters to copy_rule; the other members are placeholders.
    return CompiledMemory(
        collection_id=1,
        revision=1,
        rule=rule,
        codec=None,  # type: ignore[arg-type]
        keys=[],
        fields=[],
        index={},
        thresholds=None,  # type: ignore[arg-type]
        calibrated_count=0,
        candidates={},
        checksum="",
    )


class TestCopyRule:
    def test_a_member_added_during_the_copy_does_not_break_it(self) -> None:
        # The soak test met this as a 500: a PUT copying the cached rule while a recall built
        # the rule's float32 patterns ("dictionary changed size during iteration").
        patterns = np.where(np.random.default_rng(7).random((4, 64)) < 0.5, -1, 1)
        rule = make_rule("hebbian").fit(patterns)
        rule.probe = GrowsTheRuleWhenCopied(rule)
        clone = compiled_with(rule).copy_rule()
        assert rule.added_meanwhile
        assert clone.checksum() == rule.checksum()

    def test_the_copy_is_independent_of_the_original(self) -> None:
        patterns = np.where(np.random.default_rng(8).random((4, 64)) < 0.5, -1, 1)
        rule = make_rule("hebbian").fit(patterns)
        before = rule.checksum()
        clone = compiled_with(rule).copy_rule()
        clone.remove(0)
        assert rule.checksum() == before
        assert clone.n_memories_ == 3
        assert copy.deepcopy(rule).checksum() == before
