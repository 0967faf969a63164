"""What the rules keep between calls, and the in-place updates that keep it small.

The matrix rules hold their patterns one bit per unit, the dense rule holds its patterns once
(as the float32 matrix its recall multiplies by), and the projection rule does not keep its
Gram matrix or Cholesky factor. Each test pins one consequence: the public arrays are the
same as before, the bytes held are near the weights' own, and the blocked updates give the
same floats, bit for bit, as the one-shot formulas they replace.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from numpy.typing import NDArray

from service.engine import DenseRule, HebbianRule, MemoryRule, ProjectionRule, StorkeyRule
from service.engine import bits as bits_module
from service.engine import rules as rules_module
from service.engine.bits import compile_kernel, unpack

PatternMaker = Callable[[int, int], NDArray[np.int8]]


def array_bytes(rule: MemoryRule) -> int:
    """nbytes of every ndarray member, each buffer once (as ``cuebank bench`` section f counts)."""
    roots: dict[int, int] = {}
    for value in vars(rule).values():
        if isinstance(value, np.ndarray):
            root = value
            while isinstance(root.base, np.ndarray):
                root = root.base
            roots[id(root)] = int(root.nbytes)
    return sum(roots.values())


def bits_equal(a: NDArray[np.float32], b: NDArray[np.float32]) -> bool:
    """Equal to the bit, so that -0.0 and +0.0 count as different (a checksum sees them)."""
    return bool(np.array_equal(a.view(np.uint32), b.view(np.uint32)))


def old_digest(*arrays: NDArray[np.generic]) -> str:
    """The checksum formula the rules have always used, over whole arrays."""
    h = hashlib.blake2b(digest_size=32)
    for arr in arrays:
        a = np.ascontiguousarray(arr)
        h.update(str(a.dtype).encode())
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


class TestStoredPatterns:
    @pytest.mark.parametrize("make", [HebbianRule, StorkeyRule, ProjectionRule, DenseRule])
    @pytest.mark.parametrize("n_units", [1, 7, 77, 128])
    def test_patterns_come_back_as_the_int8_rows_that_were_stored(
        self, random_patterns: PatternMaker, make: Callable[[], MemoryRule], n_units: int
    ) -> None:
        X = random_patterns(6 if n_units > 7 else 1, n_units)
        rule = make().fit(X)
        got = rule.patterns_
        assert got.dtype == np.int8
        np.testing.assert_array_equal(got, X)
        assert rule.n_units_ == n_units
        assert rule.n_memories_ == X.shape[0]
        np.testing.assert_array_equal(rule.patterns_f32_, X.astype(np.float32))

    @pytest.mark.parametrize("make", [HebbianRule, ProjectionRule, DenseRule])
    def test_patterns_follow_add_and_remove(
        self, random_patterns: PatternMaker, make: Callable[[], MemoryRule]
    ) -> None:
        X = random_patterns(8, 45)
        rule = make().fit(X[:5]).add(X[5]).add(X[6]).remove(2).add(X[7])
        expected = np.delete(X, 2, axis=0)
        np.testing.assert_array_equal(rule.patterns_, expected)
        np.testing.assert_array_equal(rule.patterns_f32_, expected.astype(np.float32))

    @pytest.mark.parametrize("make", [HebbianRule, ProjectionRule, DenseRule])
    def test_changing_the_returned_patterns_does_not_change_the_rule(
        self, random_patterns: PatternMaker, make: Callable[[], MemoryRule]
    ) -> None:
        X = random_patterns(4, 32)
        rule = make().fit(X)
        before = rule.checksum()
        rule.patterns_[0] *= -1
        assert rule.checksum() == before
        np.testing.assert_array_equal(rule.patterns_, X)

    def test_the_float32_patterns_are_rebuilt_after_an_add(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(5, 40)
        rule = HebbianRule().fit(X[:4])
        assert rule.patterns_f32_.shape == (4, 40)
        rule.add(X[4])
        np.testing.assert_array_equal(rule.patterns_f32_, X.astype(np.float32))

    def test_setting_patterns_validates_them(self) -> None:
        rule = HebbianRule().fit(np.ones((1, 4)))
        rule.patterns_ = np.array([[1, -1, 1, -1]])
        np.testing.assert_array_equal(rule.patterns_, [[1, -1, 1, -1]])
        with pytest.raises(ValueError, match="only -1 and \\+1"):
            rule.patterns_ = np.array([[1, 0, 1, -1]])


class TestBytesHeld:
    def test_the_projection_rule_keeps_no_gram_matrix_or_factor(
        self, random_patterns: PatternMaker
    ) -> None:
        n, p = 128, 120
        rule = ProjectionRule().fit(random_patterns(p, n))
        shapes = [v.shape for v in vars(rule).values() if isinstance(v, np.ndarray)]
        assert (p, p) not in shapes
        # W, its float64 diagonal and the patterns at one bit per unit
        assert array_bytes(rule) == n * n * 4 + n * 8 + p * n // 8  # 128 units: two whole words
        assert rule.weight_bytes_ == n * n * 4

    @pytest.mark.parametrize("n_units", [64, 100])
    def test_the_dense_rule_keeps_float32_rows_and_their_bits_only(
        self, random_patterns: PatternMaker, n_units: int
    ) -> None:
        X = random_patterns(300, n_units)
        rule = DenseRule().fit(X).add(X[0] * -1).remove(5)
        words = -(-n_units // 64)  # each row's bits padded to whole 64-bit words
        assert rule.weight_bytes_ == 300 * n_units * 4
        assert array_bytes(rule) == 300 * n_units * 4 + 300 * words * 8
        assert rule.patterns_f32_ is rule._x  # recall reads the kept array, not a copy
        # the two copies stay the same patterns through fit, add and remove
        assert np.array_equal(unpack(rule._bits, n_units), rule.patterns_)

    @pytest.mark.parametrize("keep_diagonal", [False, True])
    def test_the_storkey_rule_keeps_one_weight_matrix(
        self, random_patterns: PatternMaker, keep_diagonal: bool
    ) -> None:
        n = 64
        rule = StorkeyRule(keep_diagonal=keep_diagonal).fit(random_patterns(10, n))
        rule.add(random_patterns(1, n))
        assert array_bytes(rule) == n * n * 4 + n * 8 + 11 * n // 8

    @pytest.mark.parametrize("make", [HebbianRule, StorkeyRule, ProjectionRule, DenseRule])
    def test_held_bytes_counts_every_array_and_builds_nothing(
        self, random_patterns: PatternMaker, make: Callable[[], MemoryRule]
    ) -> None:
        rule = make().fit(random_patterns(20, 48))
        assert rule.held_bytes_ == array_bytes(rule)
        # neither a float32 view nor the verdict's dot products leave anything behind
        rule.patterns_f32_  # noqa: B018
        rule.pattern_dots(np.ones((3, 48), dtype=np.float32))
        rule.pattern_dots(np.ones((64, 48), dtype=np.float32))
        assert rule.held_bytes_ == array_bytes(rule)
        if not isinstance(rule, DenseRule):
            # the 20 patterns at one bit per unit, 48 bits padded to one 64-bit word each
            assert rule.held_bytes_ == rule.weight_bytes_ + 20 * 8 + (
                48 * 8 if hasattr(rule, "diagonal_") else 0
            )


class TestPatternDots:
    @pytest.mark.parametrize("make", [HebbianRule, StorkeyRule, ProjectionRule, DenseRule])
    @pytest.mark.parametrize("n_units", [7, 48, 64, 130])
    @pytest.mark.parametrize("n_states", [1, 5, 24, 25, 90])
    def test_dot_products_are_numpys_integer_product(
        self,
        random_patterns: PatternMaker,
        make: Callable[[], MemoryRule],
        n_units: int,
        n_states: int,
    ) -> None:
        # the popcount kernel against numpy's int64 matmul, for widths short of, at and past a
        # whole 64-bit word
        X = random_patterns(min(30, n_units // 2 + 2), n_units)
        rule = make().fit(X) if make is not ProjectionRule else make().fit(X[: n_units // 2])
        rng = np.random.default_rng(n_units * 100 + n_states)
        states = rng.choice(np.array([-1, 0, 1], dtype=np.int8), size=(n_states, n_units))
        expected = states.astype(np.int64) @ rule.patterns_.astype(np.int64).T
        got = rule.pattern_dots(states.astype(np.float32))
        assert got.dtype == np.float32
        np.testing.assert_array_equal(got, expected)

    @pytest.mark.parametrize("n_units", [7, 64, 130])
    @pytest.mark.parametrize("rows", [[0], [2, 2], [1, 0, 3, 4]])
    def test_products_of_stored_rows_are_numpys_integer_product(
        self, random_patterns: PatternMaker, n_units: int, rows: list[int]
    ) -> None:
        # the stored rows against every stored row, straight from their bits (one row too)
        X = random_patterns(9, n_units)
        picked = np.array(rows, dtype=np.intp)
        expected = X[picked].astype(np.int64) @ X.astype(np.int64).T
        got = bits_module.row_dots(bits_module.pack(X), picked, n_units)
        assert got.dtype == np.float32
        np.testing.assert_array_equal(got, expected)

    @pytest.mark.parametrize("n_units", [1, 7, 63, 64, 65, 130, 1024])
    @pytest.mark.parametrize("n_states", [1, 3, 40])
    @pytest.mark.parametrize("dtype", [np.float32, np.int8])
    def test_states_are_packed_as_numpys_packbits_packs_them(
        self, n_units: int, n_states: int, dtype: type
    ) -> None:
        # the packing kernel against np.packbits and np.count_nonzero, the reference it
        # replaced, on states of -1, 0 and +1 in any order (and a state with nothing known)
        rng = np.random.default_rng(n_units * 100 + n_states)
        states = rng.integers(-1, 2, size=(n_states, n_units)).astype(dtype)
        states[0] = 0
        signs, known, n_known = bits_module._packed_states(states)
        np.testing.assert_array_equal(signs, bits_module.words(np.packbits(states > 0, axis=1)))
        np.testing.assert_array_equal(known, bits_module.words(np.packbits(states != 0, axis=1)))
        np.testing.assert_array_equal(n_known, np.count_nonzero(states, axis=1))
        X = rng.choice(np.array([-1, 1], dtype=np.int8), size=(5, n_units))
        np.testing.assert_array_equal(
            bits_module.packed_dots(states, bits_module.pack(X), n_units),
            states.astype(np.int64) @ X.astype(np.int64).T,
        )


class TestHebbianUpdate:
    @pytest.mark.parametrize("n_units", [5, 300, 1500])
    def test_blocked_add_and_remove_equal_a_full_compile_to_the_bit(
        self, random_patterns: PatternMaker, n_units: int
    ) -> None:
        # 1500 units take many row blocks, with a short last one
        X = random_patterns(9, n_units)
        rule = HebbianRule().fit(X[:4])
        for x in X[4:]:
            rule.add(x)
        rule.remove(6).remove(1)
        full = HebbianRule().fit(np.delete(X, [1, 6], axis=0))
        assert bits_equal(rule._w, full._w)
        assert rule.checksum() == full.checksum()

    @pytest.mark.parametrize("sign", [1, -1])
    def test_the_signed_outer_update_equals_adding_the_zero_diagonal_outer_product(
        self, rng: np.random.Generator, sign: int
    ) -> None:
        n = 700
        w = rng.standard_normal((n, n)).astype(np.float32)
        w[np.diag_indices(n)] = np.where(rng.random(n) < 0.5, -0.0, 0.5).astype(np.float32)
        x8 = np.where(rng.random(n) < 0.5, -1, 1).astype(np.int8)
        xf = x8.astype(np.float32)
        outer = np.multiply.outer(xf, xf)
        np.fill_diagonal(outer, 0.0)
        expected = w + outer if sign > 0 else w - outer
        rules_module._add_outer_sign(w, x8, sign)
        assert bits_equal(w, expected)


def storkey_three_passes(
    patterns: NDArray[np.int8],
) -> tuple[NDArray[np.float32], NDArray[np.float64]]:
    """Storkey's update as whole-matrix passes: the formula the blocked update must match."""
    n = patterns.shape[1]
    w = np.zeros((n, n), dtype=np.float32)
    diagonal = np.zeros(n)
    for x8 in patterns:
        x = x8.astype(np.float32)
        f = w @ x
        diagonal += (1.0 - 2.0 * x.astype(np.float64) * f.astype(np.float64)) / n
        w *= np.float32(1.0 + 2.0 / n)
        w += np.multiply.outer(x / np.float32(n), x - f)
        w -= np.multiply.outer(f / np.float32(n), x)
        np.fill_diagonal(w, 0.0)
    return w, diagonal


class TestStorkeyUpdate:
    @pytest.mark.parametrize("n_units", [10, 100, 600])
    def test_the_blocked_update_equals_the_whole_matrix_passes_to_the_bit(
        self, random_patterns: PatternMaker, n_units: int
    ) -> None:
        X = random_patterns(12, n_units)
        w, diagonal = storkey_three_passes(X)
        rule = StorkeyRule().fit(X[:7])
        for x in X[7:]:
            rule.add(x)
        assert bits_equal(rule.weights_, w)
        np.testing.assert_array_equal(rule.diagonal_, diagonal)
        assert rule.checksum() == old_digest(X, w, diagonal)

    def test_keeping_the_diagonal_changes_the_recall_weights_only(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(12, 200)
        w, diagonal = storkey_three_passes(X)
        kept = StorkeyRule(keep_diagonal=True).fit(X[:3])
        for x in X[3:]:
            kept.add(x)
        expected = w.copy()
        expected[np.diag_indices_from(expected)] = diagonal.astype(np.float32)
        assert bits_equal(kept.weights_, expected)
        np.testing.assert_array_equal(kept.self_coupling(), diagonal.astype(np.float32))
        # the learned arrays are the same, so is the checksum
        assert kept.checksum() == StorkeyRule().fit(X).checksum() == old_digest(X, w, diagonal)


class TestProjectionWithoutResidentFactor:
    @pytest.mark.parametrize("keep_diagonal", [False, True])
    def test_add_and_remove_after_fit_equal_a_fresh_fit(
        self, random_patterns: PatternMaker, keep_diagonal: bool
    ) -> None:
        X = random_patterns(70, 100)
        rule = ProjectionRule(keep_diagonal=keep_diagonal).fit(X[:60])
        for i in (0, 30, 57):
            rule.remove(i)
        for x in X[60:]:
            rule.add(x)
        kept = np.concatenate([np.delete(X[:60], [0, 31, 59], axis=0), X[60:]])
        full = ProjectionRule(keep_diagonal=keep_diagonal).fit(kept)
        np.testing.assert_array_equal(rule.patterns_, kept)
        np.testing.assert_allclose(rule.weights_, full.weights_, atol=1e-5)
        np.testing.assert_allclose(rule.diagonal_, full.diagonal_, atol=1e-9)
        # and W is still the projector onto the patterns' span
        xd = kept.astype(np.float64)
        projector = np.linalg.pinv(xd) @ xd
        if not keep_diagonal:
            np.fill_diagonal(projector, 0.0)
        np.testing.assert_allclose(rule.weights_, projector, atol=1e-5)

    def test_gram_and_cholesky_are_computed_on_request(self, random_patterns: PatternMaker) -> None:
        X = random_patterns(30, 50)
        rule = ProjectionRule().fit(X[:29]).add(X[29])
        xd = X.astype(np.float64)
        np.testing.assert_array_equal(rule.gram_, xd @ xd.T)
        chol = rule.cholesky_
        np.testing.assert_array_equal(chol, np.tril(chol))
        np.testing.assert_allclose(chol @ chol.T, xd @ xd.T, rtol=0, atol=1e-11)

    def test_the_float32_gram_is_the_exact_float64_gram(
        self, random_patterns: PatternMaker
    ) -> None:
        X = random_patterns(40, 3000)
        X[:, :2900] = X[0, :2900]  # overlaps near N, the largest values the sums reach
        xd = X.astype(np.float64)
        np.testing.assert_array_equal(rules_module._gram(X), xd @ xd.T)

    def test_a_dependent_add_after_removals_still_names_its_combination(
        self, rng: np.random.Generator
    ) -> None:
        x0, x1, x2 = (np.where(rng.random(60) < 0.5, -1, 1) for _ in range(3))
        x3 = np.where(x0 == -x2, -x0, np.where(rng.random(60) < 0.5, -1, 1))
        extra = np.where(rng.random(60) < 0.5, -1, 1)
        rule = ProjectionRule().fit(np.stack([x0, extra, x1, x2, x3]).astype(np.int8))
        rule.remove(1)  # now x0, x1, x2, x3
        with pytest.raises(ValueError, match="memories 0, 2, 3") as info:
            rule.add(x0 - x2 + x3)
        assert getattr(info.value, "indices", None) == (0, 2, 3, 4)
        assert rule.n_memories_ == 4


class TestDenseChecksum:
    @pytest.mark.parametrize(("n_memories", "n_units"), [(1, 3), (5000, 64), (4097, 64)])
    def test_the_blockwise_checksum_is_the_digest_of_the_int8_patterns_and_beta(
        self, random_patterns: PatternMaker, n_memories: int, n_units: int
    ) -> None:
        # 64 units make blocks of 4096 rows: one block, two, and a one-row remainder
        X = random_patterns(n_memories, n_units)
        rule = DenseRule(beta=12.0).fit(X)
        assert rule.checksum() == old_digest(X, np.array([12.0]))


class TestKernelCompile:
    def test_without_a_writable_cache_the_kernel_is_compiled_in_memory(self) -> None:
        # numba refuses cache=True where it finds no writable directory (a read-only install
        # and home, as under systemd's ProtectSystem=strict): the import must still work
        calls: list[bool] = []

        def njit(signature: str, *, cache: bool, nogil: bool) -> Callable[[Any], Any]:
            calls.append(cache)
            if cache:
                raise RuntimeError("cannot cache function 'f': no locator available for file")
            return lambda function: ("compiled", function, signature, nogil)

        def kernel() -> None:
            return None

        compiled = compile_kernel(kernel, njit=njit)
        assert calls == [True, False]
        assert compiled[0] == "compiled"
        assert compiled[1] is kernel
        assert compiled[3] is True  # still releases the GIL

    def test_the_kernels_are_compiled_for_their_one_signature(self) -> None:
        assert len(bits_module._count_dots.signatures) == 1
        assert len(bits_module._pack_states.signatures) == 1
