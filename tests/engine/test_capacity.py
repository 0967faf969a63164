"""Capacity: the Hebbian one-step error against theory, and the capacity report's advice."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from numpy.typing import NDArray

from service.engine import (
    DenseRule,
    HebbianRule,
    ProjectionRule,
    StorkeyRule,
    capacity_report,
    hebbian_bit_error,
)

PatternMaker = Callable[[int, int], NDArray[np.int8]]

# Source: Hertz, Krogh & Palmer (1991), ch. 2, table of P_err against α
TEXTBOOK = [(0.105, 0.001), (0.138, 0.0036), (0.185, 0.01), (0.37, 0.05), (0.61, 0.1)]


class TestHebbianBitError:
    @pytest.mark.parametrize(("load", "p_err"), TEXTBOOK)
    def test_the_formula_reproduces_the_textbook_table(self, load: float, p_err: float) -> None:
        # the table prints one or two significant digits
        assert hebbian_bit_error(load) == pytest.approx(p_err, rel=0.1)

    @pytest.mark.parametrize(("load", "p_err"), TEXTBOOK)
    def test_measured_one_step_error_of_random_patterns_matches_the_formula(
        self, rng: np.random.Generator, load: float, p_err: float
    ) -> None:
        n = 2000
        # An odd P with even N makes h_i ξ_i a sum of P(N−1) odd terms, so h is never 0 and
        # no bit is a tie that neither counts as right nor as wrong.
        p = 2 * round((load * n - 1) / 2) + 1
        X = np.where(rng.random((p, n)) < 0.5, -1, 1).astype(np.int8)
        h = HebbianRule().fit(X).local_fields(X.astype(np.float32))
        assert not (h == 0).any()
        measured = float((h * X < 0).mean())
        theory = hebbian_bit_error(p / n)
        # Tolerance: 4 binomial standard errors over the N·P bits (≈ 5 % relative at the
        # smallest rate, 420 expected errors), plus the finite-N shift: the signal is
        # (N − 1)/N and the crosstalk variance (P − 1)(N − 1)/N², i.e. an effective load
        # (P − 1)/(N − 1) instead of P/N. Bits of one pattern share crosstalk only weakly,
        # so the binomial SE is the right scale (measured |z| < 1.5 at every load).
        se = math.sqrt(theory * (1 - theory) / X.size)
        finite_n = abs(theory - hebbian_bit_error((p - 1) / (n - 1)))
        print(f"α = {p / n:.4f}: measured {measured:.5f}, theory {theory:.5f}, SE {se:.1e}")
        assert measured == pytest.approx(theory, abs=4 * se + finite_n)
        report = capacity_report(HebbianRule().fit(X))
        assert report.unstable_bit_fraction == pytest.approx(measured)
        assert report.predicted_bit_error == pytest.approx(theory)

    def test_no_load_means_no_error(self) -> None:
        assert hebbian_bit_error(0.0) == 0.0


class TestCapacityReport:
    def test_a_lightly_loaded_hebbian_memory_is_well_within_capacity(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(20, 500)
        report = capacity_report(HebbianRule().fit(X))
        assert report.load == pytest.approx(0.04)
        assert report.fixed_point_fraction == 1.0
        assert report.rule_capacity == pytest.approx(0.138 * 500)
        assert not report.correlated
        assert report.recommended_rule == "hebbian"
        assert "well within its capacity" in report.advice
        # random pairs: mean |m| = √(2/π)/√N ≈ 0.036 (half-normal mean)
        assert report.mean_abs_overlap == pytest.approx(math.sqrt(2 / math.pi / 500), rel=0.15)

    def test_a_hebbian_memory_past_its_capacity_is_told_to_change_rule(
        self, random_patterns: PatternMaker
    ) -> None:
        report = capacity_report(HebbianRule().fit(random_patterns(100, 500)))
        # Source: Amit, Gutfreund & Sompolinsky (1985): α = 0.2 > α_c ≈ 0.138
        assert report.capacity_used > 1.0
        assert report.fixed_point_fraction < 0.5
        assert "past its capacity" in report.advice
        assert report.recommended_rule == "projection"

    def test_correlated_memories_are_flagged_and_sent_to_projection(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(20, 400)
        X[:, :200] = X[0, :200]
        report = capacity_report(HebbianRule().fit(X))
        assert report.correlated
        assert report.mean_abs_overlap > 0.45
        assert report.recommended_rule == "projection"
        assert "correlated" in report.advice
        assert capacity_report(ProjectionRule().fit(X)).fixed_point_fraction == 1.0

    def test_storkey_capacity_is_n_over_root_two_log_n(self, random_patterns: PatternMaker) -> None:
        report = capacity_report(StorkeyRule().fit(random_patterns(30, 400)))
        # Source: Storkey (1997)
        assert report.rule_capacity == pytest.approx(400 / math.sqrt(2 * math.log(400)))
        assert report.recommended_rule == "storkey"

    def test_duplicates_are_counted(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(10, 200)
        X[7] = X[2]
        report = capacity_report(HebbianRule().fit(X))
        assert report.duplicates == 1
        assert "duplicates" in report.advice

    def test_a_dense_memory_has_no_finite_capacity_and_stays_dense(
        self, random_patterns: PatternMaker
    ) -> None:
        report = capacity_report(DenseRule().fit(random_patterns(3000, 64)), sample=500)
        assert report.rule_capacity == -1.0
        assert report.recommended_rule == "dense"
        assert report.checked_memories == 500
        assert report.to_dict()["n_memories"] == 3000
