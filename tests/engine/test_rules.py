"""Learning rules: weights against reference implementations, and what each rule stores."""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from numpy.typing import NDArray

from service.engine import (
    DenseRule,
    DependentMemoryError,
    HebbianRule,
    ProjectionRule,
    StorkeyRule,
    default_beta,
    hebbian_bit_error,
    make_rule,
    settle,
)
from service.engine.rules import exact_readout

PatternMaker = Callable[[int, int], NDArray[np.int8]]


def one_step_fixed(
    rule: HebbianRule | StorkeyRule | ProjectionRule, states: NDArray[np.int8]
) -> NDArray[np.bool_]:
    """Which states one synchronous update leaves unchanged (a zero field keeps the unit)."""
    result = settle(rule, states, max_steps=1)
    return np.asarray(result.converged)


def storkey_literal(patterns: NDArray[np.int8]) -> NDArray[np.float64]:
    """Storkey's rule written term by term, with its h_ij as an explicit double loop."""
    n = patterns.shape[1]
    w = np.zeros((n, n))
    for x in patterns.astype(np.float64):
        h = np.zeros((n, n))
        for i in range(n):
            for j in range(n):
                h[i, j] = sum(w[i, k] * x[k] for k in range(n) if k not in (i, j))
        new = np.empty_like(w)
        for i in range(n):
            for j in range(n):
                new[i, j] = w[i, j] + (x[i] * x[j] - x[i] * h[j, i] - h[i, j] * x[j]) / n
        w = new
    return w


def doubtful_states(
    X: NDArray[np.int8], rng: np.random.Generator, count: int
) -> NDArray[np.float32]:
    """``count`` stored patterns as float32 states from sure to hopeless: the share of flipped
    units rises from 0 to a half down the rows, and a fifth of all units are unknown."""
    states = X[rng.integers(0, X.shape[0], size=count)].astype(np.float32)
    states[rng.random(states.shape) < np.linspace(0.0, 0.5, count)[:, None]] *= -1
    states[rng.random(states.shape) < 0.2] = 0.0
    return states


def dependent_set(rng: np.random.Generator, n_units: int) -> NDArray[np.int8]:
    """Five ±1 patterns where row 4 = row 0 − row 2 + row 3 and row 1 is unrelated.

    x0 − x2 + x3 is ±1 at every unit as long as x3 = −x0 wherever x0 = −x2, which is how x3
    is drawn; elsewhere x0 − x2 = 0 and the sum is x3 itself.
    """
    x0, x1, x2 = (np.where(rng.random(n_units) < 0.5, -1, 1) for _ in range(3))
    free = np.where(rng.random(n_units) < 0.5, -1, 1)
    x3 = np.where(x0 == -x2, -x0, free)
    x4 = x0 - x2 + x3
    assert set(np.unique(x4)) <= {-1, 1}
    return np.stack([x0, x1, x2, x3, x4]).astype(np.int8)


class TestHebbianRule:
    def test_weights_equal_the_explicit_outer_product_sum(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(7, 50)
        reference = np.zeros((50, 50))
        for x in X.astype(np.float64):
            reference += np.outer(x, x) / 50
        np.fill_diagonal(reference, 0.0)
        # Source: Hopfield (1982), W = (1/N) Σ ξξᵀ with no self-coupling
        np.testing.assert_allclose(HebbianRule().fit(X).weights_, reference, rtol=0, atol=1e-7)

    def test_incremental_add_and_remove_equal_a_full_compile_bit_for_bit(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(12, 80)
        rule = HebbianRule().fit(X[:5])
        for x in X[5:]:
            rule.add(x)
        rule.remove(3).remove(0)
        kept = np.delete(X, [0, 3], axis=0)
        full = HebbianRule().fit(kept)
        np.testing.assert_array_equal(rule.patterns_, kept)
        np.testing.assert_array_equal(rule.weights_, full.weights_)
        assert rule.checksum() == full.checksum()

    def test_equal_memories_give_equal_checksums_and_different_ones_differ(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(6, 40)
        assert HebbianRule().fit(X).checksum() == HebbianRule().fit(X.copy()).checksum()
        Y = X.copy()
        Y[2, 5] *= -1
        assert HebbianRule().fit(X).checksum() != HebbianRule().fit(Y).checksum()

    def test_every_pattern_is_a_fixed_point_below_the_mceliece_load(
        self, rng: np.random.Generator
    ) -> None:
        n = 1000
        p = math.floor(n / (4 * math.log(n)))  # 36
        trials = 20
        # Source: McEliece, Posner, Rodemich & Venkatesh (1987): at P ≤ N/(4 ln N) all P
        # patterns are fixed points with probability → 1.
        # Tolerance: a trial fails only if one of its N·P bits is unstable; by the one-step
        # error ½ erfc(1/√(2α)) that is ≤ N·P·P_err ≈ 0.004 per trial, so two or more failed
        # trials out of 20 has probability below 1e-4.
        expected_bad_bits = n * p * hebbian_bit_error(p / n)
        assert expected_bad_bits < 0.01
        all_fixed = 0
        for _ in range(trials):
            X = np.where(rng.random((p, n)) < 0.5, -1, 1).astype(np.int8)
            all_fixed += bool(one_step_fixed(HebbianRule().fit(X), X).all())
        assert all_fixed >= trials - 1


class TestStorkeyRule:
    def test_weights_equal_a_literal_implementation_of_the_update(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(4, 10)
        reference = storkey_literal(X)
        # Source: Storkey (1997), w_ij ← w_ij + (1/N)(ξ_iξ_j − ξ_i h_ji − h_ij ξ_j),
        # h_ij = Σ_{k≠i,j} w_ik ξ_k; float32 accumulation, hence 1e-5
        kept = StorkeyRule(keep_diagonal=True).fit(X)
        np.testing.assert_allclose(kept.weights_, reference, rtol=0, atol=1e-5)
        zeroed = reference.copy()
        np.fill_diagonal(zeroed, 0.0)
        np.testing.assert_allclose(StorkeyRule().fit(X).weights_, zeroed, rtol=0, atol=1e-5)
        np.testing.assert_allclose(StorkeyRule().fit(X).diagonal_, np.diag(reference), atol=1e-9)

    def test_the_default_recall_weights_have_a_zero_diagonal(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(30, 100)
        rule = StorkeyRule().fit(X)
        assert not rule.keep_diagonal
        np.testing.assert_array_equal(np.diag(rule.weights_), 0.0)
        np.testing.assert_array_equal(rule.self_coupling(), 0.0)
        # the learned diagonal is still there, about α per unit (each pattern adds ≈ 1/N)
        assert rule.diagonal_.mean() == pytest.approx(0.3, abs=0.05)

    def test_adding_patterns_one_by_one_equals_fitting_them_in_order(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(15, 60)
        rule = StorkeyRule().fit(X[:1])
        for x in X[1:]:
            rule.add(x)
        full = StorkeyRule().fit(X)
        np.testing.assert_array_equal(rule.weights_, full.weights_)
        assert rule.checksum() == full.checksum()

    def test_nearly_all_patterns_are_fixed_points_at_storkeys_capacity_where_hebbian_fails(
        self, rng: np.random.Generator
    ) -> None:
        n = 400
        p = round(n / math.sqrt(2 * math.log(n)))  # 116, α ≈ 0.29
        X = np.where(rng.random((3 * p, n)) < 0.5, -1, 1).astype(np.int8)
        storkey, hebbian = [], []
        for t in range(3):
            Xt = X[t * p : (t + 1) * p]
            storkey.append(one_step_fixed(StorkeyRule().fit(Xt), Xt).mean())
            hebbian.append(one_step_fixed(HebbianRule().fit(Xt), Xt).mean())
        # Source: Storkey (1997), capacity N/√(2 ln N) for random patterns
        assert np.mean(storkey) >= 0.95
        # Hebbian at α ≈ 0.29: a pattern is fixed with probability (1 − P_err)^N ≈ 1e-6
        # (Hertz, Krogh & Palmer 1991, ch. 2), so even 5 % would be far out
        assert (1 - hebbian_bit_error(p / n)) ** n < 1e-5
        assert np.mean(hebbian) <= 0.05

    def test_keeping_the_diagonal_makes_wrong_states_look_stable(
        self, rng: np.random.Generator
    ) -> None:
        n, p = 200, 140  # α = 0.7, where the learned self-coupling ≈ α is comparable to h
        X = np.where(rng.random((p, n)) < 0.5, -1, 1).astype(np.int8)
        kept = StorkeyRule(keep_diagonal=True).fit(X)
        zeroed = StorkeyRule().fit(X)
        # one wrong bit per state, at a random unit; does the field keep the wrong bit?
        units = rng.integers(0, n, size=p)
        flipped = X.copy()
        flipped[np.arange(p), units] *= -1
        random_states = np.where(rng.random((300, n)) < 0.5, -1, 1).astype(np.int8)

        def wrong_bit_kept(rule: StorkeyRule) -> float:
            h = rule.local_fields(flipped.astype(np.float32))
            return float((h[np.arange(p), units] * flipped[np.arange(p), units] > 0).mean())

        def units_agreeing(rule: StorkeyRule) -> float:
            h = rule.local_fields(random_states.astype(np.float32))
            return float((h * random_states > 0).mean())

        # common practice, no published source: a self-coupling w_ii > 0 adds w_ii s_i to
        # h_i, so it votes for whatever the unit holds. Random states: with a zero diagonal
        # the field is independent of s_i and agrees half the time (binomial SE over 60 000
        # units 0.002); kept, it agrees about 70 % of the time.
        assert units_agreeing(zeroed) == pytest.approx(0.5, abs=0.01)
        assert units_agreeing(kept) > 0.6
        # flipped bits: measured 0.31 kept vs 0.04 zeroed with this seed
        assert wrong_bit_kept(kept) > 0.15
        assert wrong_bit_kept(zeroed) < 0.07
        assert wrong_bit_kept(kept) > 3 * wrong_bit_kept(zeroed)


class TestProjectionRule:
    def test_weights_with_the_diagonal_equal_the_pseudo_inverse_projector(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(20, 64)
        rule = ProjectionRule(keep_diagonal=True).fit(X)
        xd = X.astype(np.float64)
        # Source: Personnaz, Guyon & Dreyfus (1985), W = projector onto the patterns' span
        np.testing.assert_allclose(rule.weights_, xd.T @ np.linalg.pinv(xd.T), atol=1e-5)
        np.testing.assert_allclose(rule.weights_, np.linalg.pinv(xd) @ xd, atol=1e-5)

    def test_default_weights_are_the_projector_without_its_diagonal(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(20, 64)
        projector = np.linalg.pinv(X.astype(np.float64)) @ X
        np.fill_diagonal(projector, 0.0)
        np.testing.assert_allclose(ProjectionRule().fit(X).weights_, projector, atol=1e-5)

    @pytest.mark.parametrize("keep_diagonal", [False, True])
    def test_incremental_add_and_remove_equal_a_full_compile(
        self, random_patterns: PatternMaker, keep_diagonal: bool
    ) -> None:
        X = random_patterns(30, 90)
        rule = ProjectionRule(keep_diagonal=keep_diagonal).fit(X[:10])
        for x in X[10:]:
            rule.add(x)
        rule.remove(7).remove(20)
        kept = np.delete(X, [7, 21], axis=0)
        full = ProjectionRule(keep_diagonal=keep_diagonal).fit(kept)
        np.testing.assert_array_equal(rule.patterns_, kept)
        # float32 weights built along two routes; rounding stays far below 1e-5
        np.testing.assert_allclose(rule.weights_, full.weights_, atol=1e-5)
        np.testing.assert_allclose(rule.diagonal_, full.diagonal_, atol=1e-9)
        np.testing.assert_allclose(rule.gram_, full.gram_)

    @pytest.mark.parametrize("shared", [0.3, 0.45, 0.6])
    def test_correlated_patterns_are_all_fixed_points_where_hebbian_stores_none(
        self, rng: np.random.Generator, shared: float
    ) -> None:
        n, p = 200, 20
        X = np.where(rng.random((p, n)) < 0.5, -1, 1).astype(np.int8)
        block = int(shared * n)
        X[:, :block] = X[0, :block]  # every record shares these units, like a common field
        # Source: Personnaz, Guyon & Dreyfus (1985); Kanter & Sompolinsky (1987): any linearly
        # independent set is stored exactly
        assert one_step_fixed(ProjectionRule().fit(X), X).all()
        # the shared block gives every pair an overlap ≥ shared, so the Hebbian crosstalk
        # grows like P·shared instead of √(P/N), and no pattern survives
        assert not one_step_fixed(HebbianRule().fit(X), X).any()

    def test_a_flipped_bit_stays_flipped_above_half_load_only_when_the_diagonal_is_kept(
        self, rng: np.random.Generator
    ) -> None:
        n = 200
        for load in (0.3, 0.7):
            p = int(load * n)
            X = np.where(rng.random((p, n)) < 0.5, -1, 1).astype(np.int8)
            units = rng.integers(0, n, size=p)
            cues = X.copy()
            cues[np.arange(p), units] *= -1
            kept = settle(ProjectionRule(keep_diagonal=True).fit(X), cues, max_steps=20)
            zeroed = settle(ProjectionRule().fit(X), cues, max_steps=20)
            still_wrong = (kept.states[np.arange(p), units] == cues[np.arange(p), units]).mean()
            # Source: Kanter & Sompolinsky (1987): with diag W_ii = α the flipped unit sees
            # h_i = ξ_i(1 − 2α), which keeps the wrong sign once α > ½; without the
            # diagonal h_i = ξ_i(1 − α) repairs it at every load below 1.
            if load > 0.5:
                assert still_wrong == 1.0
            else:
                assert still_wrong == 0.0
            assert (zeroed.states == X).all()

    def test_duplicate_memories_raise_an_error_naming_both(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(5, 40)
        X[4] = X[1]
        with pytest.raises(DependentMemoryError, match=r"memories 1 and 4 are identical") as info:
            ProjectionRule().fit(X)
        assert info.value.indices == (1, 4)
        rule = ProjectionRule().fit(X[:4])
        with pytest.raises(DependentMemoryError, match=r"identical to memory 1") as info:
            rule.add(X[1])
        assert info.value.indices == (1, 4)

    def test_a_linearly_dependent_memory_raises_an_error_naming_its_combination(
        self, rng: np.random.Generator
    ) -> None:
        X = dependent_set(rng, 60)
        with pytest.raises(DependentMemoryError, match=r"memory 4 .* memories 0, 2, 3") as info:
            ProjectionRule().fit(X)
        assert info.value.indices == (0, 2, 3, 4)
        rule = ProjectionRule().fit(X[:4])
        with pytest.raises(DependentMemoryError, match=r"memories 0, 2, 3") as info:
            rule.add(X[4])
        assert info.value.indices == (0, 2, 3, 4)
        # the failed add leaves the memory as it was
        assert rule.n_memories_ == 4

    def test_a_reversed_pattern_is_dependent_on_the_original(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(3, 30)
        with pytest.raises(DependentMemoryError) as info:
            ProjectionRule().fit(np.vstack([X, -X[1]]))
        assert info.value.indices == (1, 3)

    def test_more_memories_than_units_are_dependent(self, random_patterns: PatternMaker) -> None:
        with pytest.raises(DependentMemoryError, match="at most n_units = 8"):
            ProjectionRule().fit(random_patterns(9, 8))


class TestDenseRule:
    def test_sparse_readout_equals_the_plain_softmax_readout(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(2000, 128)
        rule = DenseRule(beta=80.0).fit(X)
        states = X[:40].astype(np.float32)
        states[:, :30] *= -1  # some doubt, so more than one memory carries weight
        a = rule.softmax(states)
        kept = a > rule.readout_tolerance / X.shape[0]
        assert kept.sum() * 4 < a.size, "the sparse path must be the one under test"
        plain = a.astype(np.float64) @ X.astype(np.float64)
        # Source: Ramsauer et al. (2020), ξ_new = Xᵀ softmax(β X ξ); the skipped mass is
        # < readout_tolerance = 1e-6 per field
        np.testing.assert_allclose(rule.local_fields(states), plain, atol=1e-5)

    @pytest.mark.parametrize("beta", [8.0, 16.0, 32.0, 80.0])
    def test_the_sign_shortcut_gives_the_signs_of_the_real_fields(
        self, random_patterns: PatternMaker, beta: float
    ) -> None:
        # Where the best memory holds over half the softmax weight the settle loop takes its
        # pattern for the signs; checked against the float64 readout Xᵀ softmax(β' X s)
        # (Ramsauer et al. 2020) on states from sure to hopeless.
        X = random_patterns(300, 96)
        rule = DenseRule(beta=beta).fit(X)
        rng = np.random.default_rng(int(beta))
        states = doubtful_states(X, rng, 200)
        fast, _, _, _, _ = rule._fields(states, None, signs_only=True)
        a = rule.softmax(states).astype(np.float64)
        plain = a @ X.astype(np.float64)
        firm = np.abs(plain) > 1e-4  # fields this close to zero are rounding's to decide
        np.testing.assert_array_equal(np.sign(fast)[firm], np.sign(plain)[firm])
        dominant = a.max(axis=1) > 0.5 + 1e-3
        assert 0 < dominant.sum() < len(states), "both kinds of state must be under test"

    @pytest.mark.parametrize("beta", [12.0, 16.0, 80.0])
    def test_the_dominance_test_reads_the_best_memorys_softmax_weight(
        self, random_patterns: PatternMaker, beta: float
    ) -> None:
        # The compiled pass sums the best memory's weight without building the softmax; held
        # to scipy's softmax of β' X s in float64 (scipy.special.softmax), away from weights
        # within rounding of the 0.5 + 1e-3 threshold
        from scipy.special import softmax

        X = random_patterns(400, 128)
        rule = DenseRule(beta=beta).fit(X)
        rng = np.random.default_rng(int(beta))
        states = doubtful_states(X, rng, 300)
        dots = rule._dots(states)
        betas = rule._betas(states, None)
        rows = np.arange(0, 300, 2)  # every other state: rows index into the whole batch
        got = rule._dominant(dots, betas, rows)
        w = softmax(dots[rows].astype(np.float64) * betas[rows, None].astype(np.float64), axis=1)
        weight = w.max(axis=1)
        firm = np.abs(weight - (0.5 + 1e-3)) > 1e-5
        np.testing.assert_array_equal(got[firm], (weight > 0.5 + 1e-3)[firm])
        assert 0 < got.sum() < rows.size, "both kinds of state must be under test"
        assert rule._dominant(dots, betas, rows[:0]).shape == (0,)

    @pytest.mark.parametrize("n_mem", [300, 5000])
    def test_a_states_fields_are_the_same_bits_whatever_the_states_beside_it(
        self, random_patterns: PatternMaker, n_mem: int
    ) -> None:
        # Both readout paths (one product up to FULL_READOUT_MAX_MEMORIES, row by row above).
        # A float32 product of many rows may sum a row in another order than a product of
        # one (seen with OpenBLAS on an AMD EPYC): the fields must not show it.
        X = random_patterns(n_mem, 200)
        rule = DenseRule(beta=6.0).fit(X)
        rng = np.random.default_rng(n_mem)
        states = X[rng.integers(0, n_mem, size=40)].astype(np.float32)
        states[rng.random(states.shape) < 0.3] *= -1  # doubt: many memories carry weight
        together = rule.local_fields(states)
        for i in (0, 7, 39):
            np.testing.assert_array_equal(rule.local_fields(states[i : i + 1])[0], together[i])
            np.testing.assert_array_equal(rule.local_fields(states[: i + 1])[i], together[i])
        # and they are the real fields: Xᵀ softmax(β' X s) in float64 (Ramsauer et al. 2020)
        plain = rule.softmax(states).astype(np.float64) @ X.astype(np.float64)
        np.testing.assert_allclose(together, plain, atol=1e-5)

    def test_exact_readout_splits_each_weight_within_its_stated_bound(self) -> None:
        # Rows of softmax weights (summing to 1) over k = 4096 ±1 patterns, the worst k of the
        # one-product path: the error bound in the docstring is 2 k² / 2⁴⁷ = 2^-21.
        rng = np.random.default_rng(5)
        X = np.where(rng.random((4096, 64)) < 0.5, -1.0, 1.0).astype(np.float32)
        logits = rng.normal(scale=3.0, size=(6, 4096))
        w = np.exp(logits - logits.max(axis=1, keepdims=True))
        w = (w / w.sum(axis=1, keepdims=True)).astype(np.float32)
        exact = w.astype(np.float64) @ X.astype(np.float64)
        got = exact_readout(w, X)
        assert got.dtype == np.float32
        # the float64 sum rounded to float32 is within half an ulp of |field| ≤ 1: 2^-25
        assert np.abs(got - exact).max() <= 2.0**-21 + 2.0**-25
        for rows in (1, 2, 5):
            np.testing.assert_array_equal(exact_readout(w[:rows], X), got[:rows])

    def test_default_beta_grows_with_the_root_of_n_within_its_clip(self) -> None:
        # common practice, no published source: β = √N keeps chance logits at ½ nat
        assert default_beta(100) == 20.0
        assert default_beta(1024) == 32.0
        assert default_beta(10_000) == 80.0
        assert DenseRule().fit(np.ones((1, 1024))).beta_ == 32.0

    def test_checksum_depends_on_memories_and_beta(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(10, 32)
        assert DenseRule().fit(X).checksum() == DenseRule().fit(X.copy()).checksum()
        assert DenseRule().fit(X).checksum() != DenseRule(beta=5.0).fit(X).checksum()
        assert DenseRule().fit(X).checksum() != DenseRule().fit(X[::-1]).checksum()

    def test_add_and_remove_keep_patterns_in_order(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(5, 32)
        rule = DenseRule().fit(X[:3]).add(X[3]).add(X[4]).remove(1)
        np.testing.assert_array_equal(rule.patterns_, np.delete(X, 1, axis=0))
        assert rule.checksum() == DenseRule().fit(np.delete(X, 1, axis=0)).checksum()


class TestMakeRule:
    @pytest.mark.parametrize(
        ("name", "cls"),
        [
            ("hebbian", HebbianRule),
            ("storkey", StorkeyRule),
            ("projection", ProjectionRule),
            ("dense", DenseRule),
        ],
    )
    def test_each_rule_name_builds_its_rule(self, name: str, cls: type) -> None:
        rule = make_rule(name)
        assert type(rule) is cls
        assert rule.name == name

    def test_options_reach_the_constructor_unchanged(self) -> None:
        assert make_rule("projection", keep_diagonal=True, tolerance=1e-4).get_params() == {
            "keep_diagonal": True,
            "tolerance": 1e-4,
        }
        assert make_rule("dense", beta=12.5).get_params()["beta"] == 12.5
