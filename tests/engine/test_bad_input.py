"""Bad input to every public engine function is an EngineError (and a ValueError), never a
numpy traceback: wrong shapes, values outside the allowed set, NaN, empty arrays, out-of-range
parameters, unknown names, ragged lists and strings."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest

from service.engine import (
    MAX_STEPS,
    DenseRule,
    DependentMemoryError,
    EmptyMemoryError,
    EngineError,
    HebbianRule,
    MemoryRule,
    ParameterError,
    ProjectionRule,
    SettleResult,
    ShapeError,
    StateValueError,
    StorkeyRule,
    VerdictThresholds,
    capacity_report,
    default_beta,
    hebbian_bit_error,
    judge,
    make_rule,
    settle,
)

N = 16
X = np.where(np.random.default_rng(5).random((4, N)) < 0.5, -1, 1).astype(np.int8)
RULES: list[Callable[[], MemoryRule]] = [HebbianRule, StorkeyRule, ProjectionRule, DenseRule]
RULE_IDS = ["hebbian", "storkey", "projection", "dense"]

BAD_PATTERNS: dict[str, tuple[Any, type[EngineError]]] = {
    "empty list": ([], ShapeError),
    "no units": ([[]], ShapeError),
    "no rows": (np.zeros((0, N)), ShapeError),
    "3-D": (np.ones((2, 2, N)), ShapeError),
    "a zero": (np.where(np.arange(N) == 3, 0, 1)[None, :], StateValueError),
    "a two": (np.where(np.arange(N) == 3, 2, 1)[None, :], StateValueError),
    "a half": (np.full((1, N), 0.5), StateValueError),
    "NaN": (np.where(np.arange(N) == 3, np.nan, 1.0)[None, :], StateValueError),
    "infinity": (np.full((1, N), np.inf), StateValueError),
    "ragged": ([[1, -1, 1], [1, -1]], StateValueError),
    "string": ("1,-1,1", StateValueError),
    "strings": ([["1", "-1"]], StateValueError),
    "None": (None, StateValueError),
    "complex": (np.ones((1, N), dtype=complex), StateValueError),
}


def assert_engine_error(exc: pytest.ExceptionInfo[Any], kind: type[EngineError]) -> None:
    assert isinstance(exc.value, kind)
    assert isinstance(exc.value, ValueError)
    assert str(exc.value), "the message must say what is wrong"


class TestMakeRule:
    @pytest.mark.parametrize("name", ["oja", "", "Hebbian", None, 3, ["hebbian"], b"dense"])
    def test_an_unknown_rule_name_is_a_parameter_error(self, name: Any) -> None:
        with pytest.raises(ParameterError, match="rule must be one of") as exc:
            make_rule(name)
        assert_engine_error(exc, ParameterError)

    @pytest.mark.parametrize(
        ("name", "options"),
        [
            ("hebbian", {"beta": 3.0}),
            ("dense", {"keep_diagonal": True}),
            ("storkey", {"keep_diagonal": "yes"}),
            ("projection", {"tolerance": 0.0}),
            ("projection", {"tolerance": float("nan")}),
            ("projection", {"tolerance": 2.0}),
            ("dense", {"beta": 0.0}),
            ("dense", {"beta": -1.0}),
            ("dense", {"beta": float("nan")}),
            ("dense", {"beta": float("inf")}),
            ("dense", {"beta": "high"}),
            ("dense", {"readout_tolerance": -0.1}),
        ],
    )
    def test_an_unknown_or_out_of_range_option_is_a_parameter_error(
        self, name: str, options: dict[str, Any]
    ) -> None:
        with pytest.raises(ParameterError) as exc:
            make_rule(name, **options)
        assert_engine_error(exc, ParameterError)


class TestFit:
    @pytest.mark.parametrize("make", RULES, ids=RULE_IDS)
    @pytest.mark.parametrize("case", list(BAD_PATTERNS))
    def test_bad_patterns_are_rejected_by_every_rule(
        self, make: Callable[[], MemoryRule], case: str
    ) -> None:
        value, kind = BAD_PATTERNS[case]
        with pytest.raises(EngineError) as exc:
            make().fit(value)  # type: ignore[attr-defined]
        assert_engine_error(exc, kind)


class TestAddAndRemove:
    @pytest.mark.parametrize("make", RULES, ids=RULE_IDS)
    @pytest.mark.parametrize(
        ("pattern", "kind"),
        [
            (np.ones(N + 1), ShapeError),
            (np.ones(N - 1), ShapeError),
            (np.zeros(N), StateValueError),
            (np.full(N, np.nan), StateValueError),
            ("+-+-", StateValueError),
            ([], ShapeError),
            (np.ones((2, N)), ParameterError),
        ],
    )
    def test_a_bad_pattern_to_add_is_rejected(
        self, make: Callable[[], MemoryRule], pattern: Any, kind: type[EngineError]
    ) -> None:
        rule: Any = make().fit(X)  # type: ignore[attr-defined]
        with pytest.raises(EngineError) as exc:
            rule.add(pattern)
        assert_engine_error(exc, kind)
        assert rule.n_memories_ == X.shape[0]

    @pytest.mark.parametrize("make", RULES, ids=RULE_IDS)
    def test_adding_or_removing_before_fit_is_an_empty_memory_error(
        self, make: Callable[[], MemoryRule]
    ) -> None:
        rule: Any = make()
        with pytest.raises(EmptyMemoryError) as exc:
            rule.add(X[0])
        assert_engine_error(exc, EmptyMemoryError)
        if hasattr(rule, "remove"):
            with pytest.raises(EmptyMemoryError):
                rule.remove(0)

    @pytest.mark.parametrize("make", [HebbianRule, ProjectionRule, DenseRule])
    @pytest.mark.parametrize("index", [-1, 4, 10**9, 1.0, True, "0", None])
    def test_a_bad_index_to_remove_is_a_parameter_error(
        self, make: Callable[[], Any], index: Any
    ) -> None:
        rule = make().fit(X)
        with pytest.raises(ParameterError) as exc:
            rule.remove(index)
        assert_engine_error(exc, ParameterError)
        assert rule.n_memories_ == X.shape[0]

    @pytest.mark.parametrize("make", [HebbianRule, ProjectionRule, DenseRule])
    def test_removing_the_only_memory_is_an_empty_memory_error(
        self, make: Callable[[], Any]
    ) -> None:
        with pytest.raises(EmptyMemoryError):
            make().fit(X[:1]).remove(0)

    def test_a_duplicate_added_to_the_projection_rule_is_a_value_error(self) -> None:
        with pytest.raises(ValueError, match="identical") as exc:
            ProjectionRule().fit(X).add(X[2])
        assert_engine_error(exc, DependentMemoryError)


class TestSettle:
    @pytest.mark.parametrize(
        ("cues", "kind"),
        [
            (np.ones((2, N + 1)), ShapeError),
            (np.ones((2, 2, N)), ShapeError),
            ([], ShapeError),
            (np.zeros((0, N)), ShapeError),
            (np.full((1, N), 2), StateValueError),
            (np.full((1, N), np.nan), StateValueError),
            (np.full((1, N), -np.inf), StateValueError),
            ([[1, 0, -1], [1]], StateValueError),
            ("1,0,-1", StateValueError),
            ([None] * N, StateValueError),
        ],
    )
    def test_bad_cues_are_rejected(self, cues: Any, kind: type[EngineError]) -> None:
        with pytest.raises(EngineError) as exc:
            settle(HebbianRule().fit(X), cues)
        assert_engine_error(exc, kind)

    @pytest.mark.parametrize(
        "options",
        [
            {"mode": "parallel"},
            {"mode": None},
            {"max_steps": 0},
            {"max_steps": -5},
            {"max_steps": MAX_STEPS + 1},
            {"max_steps": 10**12},
            {"max_steps": 2.5},
            {"max_steps": True},
            {"max_steps": "10"},
            {"seed": -1},
            {"seed": "seed"},
            {"clamp": "yes"},
            {"record_energy": 1},
        ],
    )
    def test_bad_options_are_parameter_errors(self, options: dict[str, Any]) -> None:
        with pytest.raises(ParameterError) as exc:
            settle(DenseRule().fit(X), X, **options)
        assert_engine_error(exc, ParameterError)

    @pytest.mark.parametrize("rule", ["hebbian", None, X, HebbianRule()], ids=str)
    def test_something_other_than_a_fitted_rule_is_rejected(self, rule: Any) -> None:
        with pytest.raises(EngineError) as exc:
            settle(rule, X)
        assert_engine_error(exc, EngineError)


class TestJudge:
    def result(self, n_cues: int = X.shape[0]) -> SettleResult:
        return settle(HebbianRule().fit(X), X[:n_cues])

    @pytest.mark.parametrize(
        ("patterns", "cues", "kind"),
        [
            (X[:, :-1], X, ShapeError),
            (X, X[:, :-1], ShapeError),
            (X * 0, X, StateValueError),
            (X, X * 3, StateValueError),
            (np.where(X > 0, np.nan, -1.0), X, StateValueError),
            ("X", X, StateValueError),
            (X, [[1, 0], [1]], StateValueError),
            (X, X[:2], ShapeError),
        ],
    )
    def test_bad_patterns_or_cues_are_rejected(
        self, patterns: Any, cues: Any, kind: type[EngineError]
    ) -> None:
        with pytest.raises(EngineError) as exc:
            judge(patterns, cues, self.result())
        assert_engine_error(exc, kind)

    def test_a_result_that_is_not_from_settle_is_rejected(self) -> None:
        with pytest.raises(ParameterError):
            judge(X, X, None)  # type: ignore[arg-type]
        good = self.result()
        short = SettleResult(
            states=good.states,
            steps=good.steps[:1],
            converged=good.converged[:1],
            cycle_length=good.cycle_length[:1],
        )
        with pytest.raises(ShapeError, match=r"result\.steps"):
            judge(X, X, short)

    @pytest.mark.parametrize("top_k", [0, -1, 101, 2.0, "3", None])
    def test_a_bad_top_k_is_a_parameter_error(self, top_k: Any) -> None:
        with pytest.raises(ParameterError):
            judge(X, X, self.result(), top_k=top_k)

    def test_thresholds_of_the_wrong_type_are_a_parameter_error(self) -> None:
        with pytest.raises(ParameterError):
            judge(X, X, self.result(), {"recall_overlap": 0.9})  # type: ignore[arg-type]


class TestCapacityReport:
    @pytest.mark.parametrize("rule", [HebbianRule(), DenseRule(), "hebbian", None], ids=str)
    def test_an_unfitted_rule_or_a_non_rule_is_rejected(self, rule: Any) -> None:
        with pytest.raises(EngineError) as exc:
            capacity_report(rule)
        assert_engine_error(exc, EngineError)

    @pytest.mark.parametrize("options", [{"sample": 0}, {"sample": 1.5}, {"seed": -3}])
    def test_bad_options_are_parameter_errors(self, options: dict[str, Any]) -> None:
        with pytest.raises(ParameterError):
            capacity_report(HebbianRule().fit(X), **options)

    @pytest.mark.parametrize("load", [-0.1, float("nan"), float("inf"), "0.1", None])
    def test_a_bad_load_for_the_bit_error_is_a_parameter_error(self, load: Any) -> None:
        with pytest.raises(ParameterError):
            hebbian_bit_error(load)


class TestDefaultBeta:
    @pytest.mark.parametrize("n_units", [0, -4, 2.5, "256", None, True, 2**40])
    def test_a_bad_unit_count_is_a_parameter_error(self, n_units: Any) -> None:
        with pytest.raises(ParameterError) as exc:
            default_beta(n_units)
        assert_engine_error(exc, ParameterError)


class TestVerdictThresholds:
    @pytest.mark.parametrize("field", ["recall_overlap", "min_agreement", "min_cue_margin"])
    @pytest.mark.parametrize("value", [float("nan"), float("inf"), -3.0, 5.0, "high", [0.5]])
    def test_a_bad_threshold_is_a_parameter_error(self, field: str, value: Any) -> None:
        with pytest.raises(ParameterError) as exc:
            VerdictThresholds(**{field: value})
        assert_engine_error(exc, ParameterError)
