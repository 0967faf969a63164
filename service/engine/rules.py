"""Learning rules: turn a matrix of ±1 patterns into a memory that the dynamics can settle in.

Four published rules, each an estimator in the scikit-learn manner: hyperparameters go to the
constructor, :meth:`fit` learns from an ``(n_memories, n_units)`` matrix of ±1 values, learned
arrays end in ``_``.

* :class:`HebbianRule` — outer-product rule W = (1/N) Σ ξξᵀ with zero diagonal (Hopfield 1982).
* :class:`StorkeyRule` — Storkey's incremental rule (Storkey 1997).
* :class:`ProjectionRule` — pseudo-inverse rule W = Xᵀ (X Xᵀ)⁻¹ X (Personnaz, Guyon & Dreyfus
  1985; Kanter & Sompolinsky 1987), computed through a Cholesky factor of the P×P Gram matrix.
* :class:`DenseRule` — modern Hopfield update ξ ← sign(Xᵀ softmax(β X ξ)) (Ramsauer et al. 2020).

Here X is the pattern matrix with one memory per row, shape ``(n_memories, n_units)``.

The matrix rules share one recall interface: :meth:`local_fields` returns h = s W for a batch
of states, :meth:`energy` returns E = -½ sᵀWs. The dense rule offers the same two methods with
its own field and its log-sum-exp energy, so :mod:`service.engine.dynamics` drives all four.

Examples
--------
>>> import numpy as np
>>> from service.engine import HebbianRule
>>> X = np.array([[1, -1, 1, -1], [1, 1, -1, -1]])
>>> rule = HebbianRule().fit(X)
>>> rule.weights_
array([[ 0. ,  0. ,  0. , -0.5],
       [ 0. ,  0. , -0.5,  0. ],
       [ 0. , -0.5,  0. ,  0. ],
       [-0.5,  0. ,  0. ,  0. ]], dtype=float32)
"""

from __future__ import annotations

import hashlib
import math
from typing import Any, ClassVar, Final, Self

import numpy as np
from numpy.typing import NDArray

from ._checks import as_patterns, check_float, check_int
from .bits import compile_kernel, pack, packed_dots, unpack, unpack_f32
from .errors import DependentMemoryError, EmptyMemoryError, ParameterError
from .rows import top2

__all__ = [
    "RULE_NAMES",
    "DenseRule",
    "HebbianRule",
    "MemoryRule",
    "ProjectionRule",
    "StorkeyRule",
    "default_beta",
    "make_rule",
]

F32 = NDArray[np.float32]
F64 = NDArray[np.float64]
I8 = NDArray[np.int8]


class MemoryRule:
    """Common base of the four rules (not used directly).

    Attributes
    ----------
    patterns_ : ndarray of int8, shape (n_memories, n_units)
        The stored memories, in the order they were fitted and added. The rules keep them in
        a compact form (the matrix rules one bit per unit, the dense rule the float32 matrix
        its recall multiplies by), so each access builds a new array: changing it does not
        change the rule.
    """

    name: ClassVar[str] = ""
    #: Whether the weights are symmetric, which is what guarantees that ``async`` settling
    #: never raises the energy and ``sync`` ends in a fixed point or a 2-cycle.
    symmetric: ClassVar[bool] = True
    #: Whether :meth:`remove` forgets one memory incrementally (Storkey's rule cannot).
    supports_remove: ClassVar[bool] = True

    # The patterns, one bit per unit (set for +1) with rows padded to whole bytes, and the
    # number of units, which the padding hides. The dense rule keeps float32 rows instead.
    _bits: NDArray[np.uint8]
    _n_units: int

    def _has_patterns(self) -> bool:
        return getattr(self, "_bits", None) is not None

    def _pattern_store(self) -> NDArray[Any]:
        """The array ``patterns_`` is built from; a new one whenever the patterns change."""
        return self._bits

    def _set_patterns(self, patterns: I8) -> None:
        """Keep already validated ±1 patterns."""
        self._bits = pack(patterns)
        self._n_units = int(patterns.shape[1])

    def _decode_patterns(self) -> I8:
        return unpack(self._bits, self._n_units)

    def _pattern_shape(self) -> tuple[int, int]:
        return int(self._bits.shape[0]), self._n_units

    @property
    def patterns_(self) -> I8:
        """The stored memories as int8 ±1, shape (n_memories, n_units); a new array each time."""
        self._require_fitted()
        return self._decode_patterns()

    @patterns_.setter
    def patterns_(self, value: Any) -> None:
        self._set_patterns(as_patterns(value, "patterns_"))

    @property
    def n_units_(self) -> int:
        """Number of units N."""
        self._require_fitted()
        return self._pattern_shape()[1]

    @property
    def n_memories_(self) -> int:
        """Number of stored memories P."""
        self._require_fitted()
        return self._pattern_shape()[0]

    @property
    def patterns_f32_(self) -> F32:
        """``patterns_`` as float32, column-major: a new array each time (not kept, so the
        rule holds only its bit-packed patterns beside the weights)."""
        self._require_fitted()
        return unpack_f32(self._pattern_store(), self.n_units_)

    def pattern_dots(self, states: F32) -> F32:
        """x_μ · s for every stored pattern and state, shape (n_states, n_memories).

        ``states`` hold -1, 0 or +1 (0: unknown). The results are integers, exact in float32,
        counted against the bit-packed patterns with popcount (:func:`bits.packed_dots`).

        >>> rule = HebbianRule().fit([[1, -1, 1, 1], [-1, -1, 1, -1]])
        >>> rule.pattern_dots(np.array([[1, 0, 1, -1]], dtype=np.float32))
        array([[1., 1.]], dtype=float32)
        """
        self._require_fitted()
        return packed_dots(states, self._pattern_store(), self.n_units_)

    def _require_fitted(self) -> None:
        if not self._has_patterns():
            raise EmptyMemoryError(f"the {self.name} rule has no memories yet; call fit() first")

    def fit(self, patterns: Any) -> Self:
        """Learn from an (n_memories, n_units) matrix of ±1 values."""
        raise NotImplementedError

    def add(self, pattern: Any) -> Self:
        """Store one more pattern without recompiling."""
        raise NotImplementedError

    def remove(self, index: int) -> Self:
        """Forget the memory at row ``index`` without recompiling."""
        self._require_fitted()
        raise ParameterError(
            f"the {self.name} rule cannot forget one memory incrementally; fit it again"
        )

    def get_params(self) -> dict[str, Any]:
        """Hyperparameters as passed to the constructor."""
        return {}

    # The dynamics call these two with float32 states whose values are in {-1, 0, +1}.
    def local_fields(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        raise NotImplementedError

    def energy(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F64:
        raise NotImplementedError

    def unit_weights(self, unit: int) -> F32:
        """Row ``unit`` of the weight matrix (matrix rules only); used by ``async`` settling."""
        raise NotImplementedError

    def self_coupling(self) -> F32:
        """The diagonal of the recall weights (zeros unless the rule keeps it)."""
        raise NotImplementedError

    def checksum(self) -> str:
        """BLAKE2b digest of the learned arrays: equal memories give equal checksums."""
        raise NotImplementedError

    @property
    def weight_bytes_(self) -> int:
        """Bytes held by the arrays used at recall time."""
        raise NotImplementedError

    @property
    def held_bytes_(self) -> int:
        """Bytes of every array the rule holds now, each buffer counted once.

        The recall arrays, the stored patterns and anything a rule caches on itself; unlike
        ``patterns_.nbytes`` it builds nothing.
        """
        self._require_fitted()
        seen: set[int] = set()
        total = 0
        for value in list(vars(self).values()):
            if not isinstance(value, np.ndarray):
                continue
            root = value
            while isinstance(root.base, np.ndarray):
                root = root.base
            if id(root) not in seen:
                seen.add(id(root))
                total += int(root.nbytes)
        return total


def check_fitted_rule(rule: Any, name: str = "rule") -> MemoryRule:
    """Require a fitted :class:`MemoryRule`; anything else is an engine error, not a crash."""
    if not isinstance(rule, MemoryRule):
        raise ParameterError(
            f"{name} must be a fitted learning rule (see make_rule), got {type(rule).__name__}"
        )
    rule._require_fitted()
    return rule


#: Up to this many memories the dense rule's soft readout is one product over all of them;
#: above it each state gathers only the memories it weighs (see ``DenseRule._readout``).
FULL_READOUT_MAX_MEMORIES: Final = 4096


#: The scale of a weight's first integer part in :func:`exact_readout`.
_HI_BITS: Final = 23


def exact_readout(weights: F32, patterns: F32) -> F32:
    """``weights @ patterns`` for softmax weights (rows in [0, 1] summing to at most 1) and
    ±1 patterns, the same bits whatever the row count, the BLAS or the machine.

    A float32 matrix product may sum a row in an order that depends on how many rows come
    with it (OpenBLAS does on an AMD EPYC, in the last bits), and a field near zero then
    takes either sign: a cue's answer would depend on the cues settled beside it. Here each
    weight is split into two integers, w ≈ hi / 2²³ + lo / 2ᵐ, and each part is multiplied
    alone: every partial sum of ±hi is an integer of magnitude at most Σ hi ≤ 2²³ + k/2, and
    of ±lo at most 2²², all below 2²⁴, so float32 adds them exactly in any order (k is the
    row length). The two exact sums are joined in float64. What the split leaves out is at
    most half a unit of 2⁻ᵐ a weight, k 2⁻⁽ᵐ⁺¹⁾ ≤ 2 k² / 2⁴⁷ on a field (5e-7 at k = 4096),
    with m = 46 - ⌈log₂ k⌉.

    >>> x = np.array([[1, -1, 1], [-1, -1, 1]], dtype=np.float32)
    >>> w = np.array([[0.75, 0.25]], dtype=np.float32)
    >>> exact_readout(w, x).tolist()
    [[0.5, -1.0, 1.0]]
    """
    k = max(int(weights.shape[1]), 2)
    lo_bits = 46 - math.ceil(math.log2(k))
    hi = np.rint(weights * np.float32(2.0**_HI_BITS))
    rest = weights - hi * np.float32(2.0**-_HI_BITS)  # exact: both are multiples of w's ulp
    lo = np.rint(rest * np.float32(2.0**lo_bits))
    fields = (hi @ patterns).astype(np.float64) * 2.0**-_HI_BITS
    fields += (lo @ patterns).astype(np.float64) * 2.0**-lo_bits
    return np.asarray(fields, dtype=np.float32)


def _hash_header(h: Any, dtype: np.dtype[Any], shape: tuple[int, ...]) -> None:
    h.update(str(dtype).encode())
    h.update(str(shape).encode())


def _digest(*arrays: NDArray[Any]) -> str:
    h = hashlib.blake2b(digest_size=32)
    for arr in arrays:
        a = np.ascontiguousarray(arr)
        _hash_header(h, a.dtype, a.shape)
        h.update(a.tobytes())
    return h.hexdigest()


#: Bytes of the row blocks the in-place updates below work through, so that their
#: temporaries stay in a core's cache instead of costing a pass through memory.
_BLOCK_BYTES = 1 << 18


def _block_rows(n_rows: int, row_bytes: int) -> int:
    """Rows per block of :data:`_BLOCK_BYTES` (at least one, at most ``n_rows``)."""
    return max(1, min(n_rows, _BLOCK_BYTES // max(1, row_bytes)))


def _add_outer_sign(w: F32, x8: I8, sign: int) -> None:
    """W ← W + sign · x xᵀ off the diagonal, in place, for a ±1 vector x; O(N²).

    The same float32 additions as adding the outer product with a zeroed diagonal, so an
    integer-valued W stays exact. Row i of x xᵀ is x_i x, so each block of rows of the
    product is gathered from the two rows ±x (a copy, cheaper than multiplying it out) into
    a buffer that stays in cache for the addition: one pass over W, no N×N temporary.
    """
    n = x8.size
    xf = x8.astype(np.float32)
    rows = np.stack([-xf, xf]) if sign > 0 else np.stack([xf, -xf])
    pick = (x8 > 0).astype(np.intp)  # row 1 of ``rows`` for units at +1
    # the diagonal gets ±x_i² = ±1 below; it should get the zero of a zeroed diagonal
    zero = np.float32(0.0)
    diag = w.diagonal() + zero if sign > 0 else w.diagonal() - zero
    step = _block_rows(n, 4 * n)
    tmp = np.empty((step, n), dtype=np.float32)
    for lo in range(0, n, step):
        hi = min(lo + step, n)
        t = tmp[: hi - lo]
        np.take(rows, pick[lo:hi], axis=0, out=t, mode="clip")  # pick is 0 or 1 already
        blk = w[lo:hi]
        np.add(blk, t, out=blk)
    np.fill_diagonal(w, diag)


def _add_scaled_outer(w: F32, u: F64, scale: float, *, subtract: bool = False) -> None:
    """W ← W ± float32(u uᵀ / scale) in place, the product and quotient in float64.

    Element for element the same as ``w += (np.multiply.outer(u, u) / scale).astype(float32)``
    (or ``-=``), worked through row blocks instead of three N×N temporaries.
    """
    n = u.size
    step = _block_rows(n, 8 * n)
    for lo in range(0, n, step):
        b = slice(lo, min(lo + step, n))
        t = np.multiply.outer(u[b], u)
        t /= scale
        blk = w[b]
        if subtract:
            blk -= t.astype(np.float32)
        else:
            blk += t.astype(np.float32)


class _MatrixRule(MemoryRule):
    """Rules whose memory is an N×N weight matrix."""

    _w: F32  # recall weights, or for Hebbian the integer counts (scaled at use)
    _scale: float = 1.0

    @property
    def weights_(self) -> F32:
        """The recall weight matrix W, shape (n_units, n_units), float32."""
        self._require_fitted()
        if self._scale == 1.0:
            return self._w
        return (self._w * np.float32(self._scale)).astype(np.float32)

    def local_fields(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        """Local fields h = s W for a batch of states, shape (n_states, n_units).

        Integer weights (the Hebbian counts) give exact fields, the same bits alone or in a
        batch. Real-valued weights (Storkey, projection) are summed by the BLAS, whose order
        can depend on the batch: numpy multiplies a lone row with a matrix-vector routine, so
        a lone state goes through the product as two equal rows, which matched any batch with
        OpenBLAS on an Intel Xeon; on an AMD EPYC the product of a few rows sums in another
        order than that of many, in the last bits. A unit's sign can then differ only where
        its field is within float32 rounding of zero; the energies, computed from the fields,
        are taken one state at a time (see :meth:`energy`).
        """
        self._require_fitted()
        if states.shape[0] == 1 and self._scale == 1.0:
            h = (np.concatenate([states, states]) @ self._w)[:1]
        else:
            h = states @ self._w
        if self._scale != 1.0:
            h *= np.float32(self._scale)
        return h

    def energy(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F64:
        """E = -½ sᵀ W s for each state, shape (n_states,).

        One state at a time, each copied out as a state sent alone is: a float32 product of
        many states can sum in another order than a product of one (OpenBLAS does on an AMD
        EPYC, in the last digits), and a state's energy must not depend on the states beside
        it. Energies are only computed when a caller asks for the trace.
        """
        out = np.empty(states.shape[0], dtype=np.float64)
        for i in range(states.shape[0]):
            row = np.array(states[i : i + 1], dtype=np.float32)
            h = self.local_fields(row).astype(np.float64)
            out[i] = -0.5 * np.einsum("ij,ij->i", row.astype(np.float64), h)[0]
        return out

    def unit_weights(self, unit: int) -> F32:
        row: F32 = self._w[unit]
        if self._scale != 1.0:
            return (row * np.float32(self._scale)).astype(np.float32)
        return row

    def self_coupling(self) -> F32:
        return np.ascontiguousarray(np.diag(self.weights_)).astype(np.float32)

    def checksum(self) -> str:
        self._require_fitted()
        return _digest(self.patterns_, self._w)

    @property
    def weight_bytes_(self) -> int:
        """Bytes of the N×N float32 weight matrix, the one array recall reads."""
        self._require_fitted()
        return int(self._w.nbytes)


class HebbianRule(_MatrixRule):
    """Outer-product (Hebbian) rule, W = (1/N) Σ_μ ξ^μ ξ^μᵀ with a zero diagonal.

    The sum is kept as exact integers (float32 holds every integer below 2²⁴, far above any
    count reached here), so adding and removing one memory in O(N²) gives bit for bit the
    matrix a full compile gives. The 1/N factor is applied to the local fields, not stored.

    Capacity for random patterns is about 0.138 N (Amit, Gutfreund & Sompolinsky 1985); for
    correlated patterns it is far lower.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.where(np.random.default_rng(0).random((3, 64)) < 0.5, -1, 1)
    >>> a = HebbianRule().fit(X)
    >>> b = HebbianRule().fit(X[:2]).add(X[2])
    >>> bool((a.weights_ == b.weights_).all())
    True
    """

    name = "hebbian"

    def fit(self, patterns: Any) -> Self:
        """Compile the weights from an (n_memories, n_units) matrix of ±1 values."""
        X = as_patterns(patterns, "patterns")
        xf = X.astype(np.float32)
        counts = xf.T @ xf  # exact: every partial sum is an integer below 2**24
        np.fill_diagonal(counts, 0.0)
        self._set_patterns(X)
        self._w = np.ascontiguousarray(counts, dtype=np.float32)
        self._scale = 1.0 / X.shape[1]
        return self

    def add(self, pattern: Any) -> Self:
        """Store one more ±1 pattern of n_units values in O(N²)."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        _add_outer_sign(self._w, x[0], +1)
        self._bits = np.concatenate([self._bits, pack(x)])
        return self

    def remove(self, index: int) -> Self:
        """Forget the memory at row ``index`` of ``patterns_`` in O(N²)."""
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        _add_outer_sign(self._w, unpack(self._bits[i : i + 1], self._n_units)[0], -1)
        self._bits = np.delete(self._bits, i, axis=0)
        return self


class StorkeyRule(_MatrixRule):
    """Storkey's incremental learning rule (Storkey 1997).

    For each new pattern ξ, with h_ij = Σ_{k≠i,j} w_ik ξ_k,

        w_ij ← w_ij + (1/N) (ξ_i ξ_j − ξ_i h_ji − h_ij ξ_j).

    The rule also grows the diagonal. A positive self-coupling makes every state look more
    stable than it is, so the recall weights have a zero diagonal unless ``keep_diagonal``
    is set; the grown diagonal is kept in ``diagonal_`` for inspection. The diagonal never
    enters h_ij (k ≠ i), so zeroing it does not change the off-diagonal weights.

    Capacity for random patterns is about N / √(2 ln N), above Hebbian's 0.138 N at the
    sizes used here.

    Parameters
    ----------
    keep_diagonal : bool, default False
        Keep the learned self-couplings in the recall weights.
    """

    name = "storkey"
    supports_remove = False

    def __init__(self, *, keep_diagonal: bool = False) -> None:
        if not isinstance(keep_diagonal, bool):
            raise ParameterError(f"keep_diagonal must be true or false, got {keep_diagonal!r}")
        self.keep_diagonal = keep_diagonal

    def get_params(self) -> dict[str, Any]:
        return {"keep_diagonal": self.keep_diagonal}

    def fit(self, patterns: Any) -> Self:
        """Learn the patterns one after another, in row order."""
        X = as_patterns(patterns, "patterns")
        n = X.shape[1]
        self._w = np.zeros((n, n), dtype=np.float32)
        self.diagonal_ = np.zeros(n, dtype=np.float64)
        for x in X:
            self._learn(x)
        self._set_patterns(X)
        self._refresh()
        return self

    def add(self, pattern: Any) -> Self:
        """Learn one more pattern in O(N²); equal to fitting all patterns in this order."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        if self.keep_diagonal:
            np.fill_diagonal(self._w, 0.0)  # learning reads the zero-diagonal weights
        self._learn(x[0])
        self._bits = np.concatenate([self._bits, pack(x)])
        self._refresh()
        return self

    def _learn(self, x8: I8) -> None:
        # With f = W ξ (zero diagonal) and ξ_k² = 1, h_ij = f_i − w_ij ξ_j, and the update
        # collapses to W ← (1 + 2/N) W + (1/N)(ξξᵀ − ξfᵀ − fξᵀ): three rank-one terms instead
        # of N×N temporaries for h. The diagonal (never used by h) is tracked apart.
        # The terms are applied one row block at a time, in the order and with the float32
        # roundings of ``W *= s; W += outer(ξ/N, ξ − f); W -= outer(f/N, ξ)``, so W is the
        # same to the bit while each block stays in cache across the three passes. Row i of
        # the first product is ±c with c = (1/N)(ξ − f) (ξ_i/N = ±(1/N) exactly, and rounding
        # is symmetric), so it is gathered rather than multiplied.
        w = self._w
        x = x8.astype(np.float32)
        n = x.size
        f = w @ x
        self.diagonal_ += (1.0 - 2.0 * x.astype(np.float64) * f.astype(np.float64)) / n
        grow = np.float32(1.0 + 2.0 / n)
        c = (np.float32(1.0) / np.float32(n)) * (x - f)
        rows = np.stack([-c, c])
        pick = (x8 > 0).astype(np.intp)
        g = f / np.float32(n)
        step = _block_rows(n, 4 * n)
        tmp = np.empty((step, n), dtype=np.float32)
        for lo in range(0, n, step):
            b = slice(lo, min(lo + step, n))
            blk = w[b]
            t = tmp[: b.stop - lo]
            blk *= grow
            np.take(rows, pick[b], axis=0, out=t, mode="clip")
            blk += t
            np.multiply.outer(g[b], x, out=t)
            blk -= t
        np.fill_diagonal(w, 0.0)

    def _refresh(self) -> None:
        # one matrix serves learning and recall: with ``keep_diagonal`` the learned
        # self-couplings are written on its diagonal, and zeroed again before learning
        if self.keep_diagonal:
            self._w[np.diag_indices_from(self._w)] = self.diagonal_.astype(np.float32)

    def checksum(self) -> str:
        self._require_fitted()
        off = self._w
        if self.keep_diagonal:
            off = off.copy()
            np.fill_diagonal(off, 0.0)
        return _digest(self.patterns_, off, self.diagonal_)


_TRI_BLOCK = 128


def _solve_lower(
    chol: NDArray[np.floating[Any]], b: NDArray[Any], *, transposed: bool = False
) -> F64:
    """Solve L y = b (or Lᵀ y = b) for lower-triangular L by blocked substitution.

    numpy has no triangular solver, and ``np.linalg.solve`` factors L again in O(P³).
    Blocks of 128 keep the work at O(P²) per right-hand side, nearly all of it in GEMV/GEMM,
    with only P / 128 small dense solves.
    """
    p = chol.shape[0]
    y = np.array(b, dtype=np.float64, copy=True)
    starts = list(range(0, p, _TRI_BLOCK))
    if transposed:
        starts.reverse()
    for lo in starts:
        hi = min(lo + _TRI_BLOCK, p)
        if transposed:
            # rows lo:hi of Lᵀ: the diagonal block transposed, then the already solved tail
            if hi < p:
                y[lo:hi] -= chol[hi:, lo:hi].T @ y[hi:]
            y[lo:hi] = np.linalg.solve(chol[lo:hi, lo:hi].T, y[lo:hi])
        else:
            if lo > 0:
                y[lo:hi] -= chol[lo:hi, :lo] @ y[:lo]
            y[lo:hi] = np.linalg.solve(chol[lo:hi, lo:hi], y[lo:hi])
    return y


def _gram(X: I8) -> F64:
    """G = X Xᵀ in float64, computed as a float32 GEMM.

    Every entry and partial sum is an integer of magnitude at most N ≤ 2²⁰ (the engine's
    unit limit), which float32 holds exactly: the result equals the float64 product to the bit
    at the price of the faster single-precision GEMM.
    """
    xf = X.astype(np.float32)
    return np.asarray(xf @ xf.T, dtype=np.float64)


class ProjectionRule(_MatrixRule):
    """Projection (pseudo-inverse) rule, W = Xᵀ (X Xᵀ)⁻¹ X.

    W projects onto the span of the stored patterns, so every linearly independent set of
    up to N patterns — correlated or not — is stored as fixed points (Personnaz, Guyon &
    Dreyfus 1985; Kanter & Sompolinsky 1987). The P×P Gram matrix G = X Xᵀ is formed exactly
    (held in float64) and factored as G = L Lᵀ; then W = Yᵀ Y with Y = L⁻¹ X. No N×N inverse
    is formed.

    Only W (and the projector's float64 diagonal) is kept with the patterns: G and L hold
    2 P² float64 values, four times W's bytes at P = N. So :meth:`add` and :meth:`remove`
    rebuild them from the patterns, O(P² N + P³) each instead of O(N² + P N + P²), though
    still without a full compile's N×N product; :attr:`gram_` and :attr:`cholesky_` compute
    them on request.

    The projector's diagonal (≈ P/N) is a self-coupling that freezes wrong bits at high
    load, so it is removed from the recall weights unless ``keep_diagonal`` is set.

    Parameters
    ----------
    keep_diagonal : bool, default False
        Keep the projector's diagonal in the recall weights.
    tolerance : float, default 1e-6
        A memory whose squared distance from the span of the others is below
        ``tolerance * N`` counts as linearly dependent.

    Raises
    ------
    DependentMemoryError
        On duplicate or linearly dependent memories; the message names their positions.
    """

    name = "projection"

    def __init__(self, *, keep_diagonal: bool = False, tolerance: float = 1e-6) -> None:
        if not isinstance(keep_diagonal, bool):
            raise ParameterError(f"keep_diagonal must be true or false, got {keep_diagonal!r}")
        self.keep_diagonal = keep_diagonal
        self.tolerance = check_float(tolerance, "tolerance", low=0.0, high=1.0, low_open=True)

    def get_params(self) -> dict[str, Any]:
        return {"keep_diagonal": self.keep_diagonal, "tolerance": self.tolerance}

    @property
    def gram_(self) -> F64:
        """The Gram matrix X Xᵀ, shape (n_memories, n_memories), float64; computed, not kept."""
        self._require_fitted()
        return _gram(self.patterns_)

    @property
    def cholesky_(self) -> F64:
        """The lower Cholesky factor L of :attr:`gram_` (G = L Lᵀ); computed, not kept."""
        return np.asarray(np.linalg.cholesky(self.gram_), dtype=np.float64)

    def fit(self, patterns: Any) -> Self:
        """Compile the projector from an (n_memories, n_units) matrix of ±1 values."""
        X = as_patterns(patterns, "patterns")
        p, n = X.shape
        if p > n:
            raise DependentMemoryError(
                f"the projection rule stores at most n_units = {n} memories; got {p}, "
                "so they are linearly dependent (use the dense rule for more)",
                indices=tuple(range(n, p)),
            )
        gram = _gram(X)
        try:
            chol = np.linalg.cholesky(gram)
            ok = bool(np.all(np.diag(chol) ** 2 > self.tolerance * n))
        except np.linalg.LinAlgError:
            ok = False
        if not ok:
            self._raise_dependent(X)
        del gram
        y = _solve_lower(chol, X.astype(np.float64))  # Y = L⁻¹ X, shape (P, N)
        del chol
        y32 = y.astype(np.float32)
        full = y32.T @ y32  # the N×N product in float32: the GEMM dominates the compile
        self._set_patterns(X)
        self.diagonal_ = np.einsum("ij,ij->j", y, y)  # diag(YᵀY) in float64
        self._w = np.ascontiguousarray(full, dtype=np.float32)
        self._set_diagonal()
        return self

    def _set_diagonal(self) -> None:
        diag = self.diagonal_.astype(np.float32) if self.keep_diagonal else np.float32(0.0)
        self._w[np.diag_indices_from(self._w)] = diag

    def _raise_dependent(self, X: I8) -> None:
        """Find the first memory that depends on the ones before it and name them."""
        n = X.shape[1]
        basis: list[NDArray[np.float64]] = []  # orthonormal basis of the rows seen so far
        for i, row in enumerate(X.astype(np.float64)):
            for j in range(i):
                if np.array_equal(X[i], X[j]):
                    raise DependentMemoryError(
                        f"memories {j} and {i} are identical; the projection rule stores "
                        "each pattern once",
                        indices=(j, i),
                    )
            r = row.copy()
            for q in basis:
                r -= (q @ r) * q
            if r @ r <= self.tolerance * n:
                coeffs = np.linalg.lstsq(X[:i].T.astype(np.float64), row, rcond=None)[0]
                involved = tuple(int(k) for k in np.flatnonzero(np.abs(coeffs) > 1e-8))
                raise DependentMemoryError(
                    f"memory {i} is a linear combination of memories "
                    f"{', '.join(map(str, involved))}; the projection rule needs linearly "
                    "independent memories",
                    indices=(*involved, i),
                )
            basis.append(r / math.sqrt(float(r @ r)))
        raise DependentMemoryError(  # pragma: no cover - Cholesky failed on rounding alone
            "the memories are numerically dependent", indices=()
        )

    def add(self, pattern: Any) -> Self:
        """Store one more pattern with a rank-one update of W.

        The update needs the new pattern's residual off the stored span, which goes through
        the Cholesky factor of the Gram matrix; neither is kept, so both are rebuilt from the
        patterns first (O(P² N + P³)), then W is updated in O(N²).
        """
        self._require_fitted()
        x8 = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x8.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x8.shape[0]}")
        x = x8[0].astype(np.float64)
        p, n = self.n_memories_, self.n_units_
        new_bits = pack(x8)
        dup = np.flatnonzero((self._bits == new_bits).all(axis=1))
        if dup.size:
            raise DependentMemoryError(
                f"the new memory is identical to memory {int(dup[0])}; the projection rule "
                "stores each pattern once",
                indices=(int(dup[0]), p),
            )
        X = self.patterns_
        chol = np.asarray(np.linalg.cholesky(_gram(X)), dtype=np.float64)
        xd = X.astype(np.float64)
        del X
        # x minus its projection on the stored patterns, in float64 through the factor
        coef = _solve_lower(chol, _solve_lower(chol, xd @ x), transposed=True)
        r = np.asarray(x - xd.T @ coef)
        d2 = float(r @ r)
        if d2 <= self.tolerance * n:
            # x is in the span, so its coefficients G⁻¹ X x are exact: name only the
            # memories that take part, as fit() does, not every stored one
            involved = tuple(int(k) for k in np.flatnonzero(np.abs(coef) > 1e-8))
            raise DependentMemoryError(
                f"the new memory (position {p}) is a linear combination of memories "
                f"{', '.join(map(str, involved))}; the projection rule needs linearly "
                "independent memories",
                indices=(*involved, p),
            )
        del xd, chol
        _add_scaled_outer(self._w, r, d2)
        self.diagonal_ += r * r / d2
        self._bits = np.concatenate([self._bits, new_bits])
        self._set_diagonal()
        return self

    def remove(self, index: int) -> Self:
        """Forget one memory with a rank-one downdate of W.

        The downdate direction is the memory's dual vector Xᵀ G⁻¹ eᵢ, found through the
        Cholesky factor of the Gram matrix, rebuilt from the patterns (O(P² N + P³)); W is
        then updated in O(N²).
        """
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        X = self.patterns_
        chol = np.asarray(np.linalg.cholesky(_gram(X)), dtype=np.float64)
        e = np.zeros(X.shape[0])
        e[i] = 1.0
        coef = _solve_lower(chol, _solve_lower(chol, e), transposed=True)
        del chol
        u = X.astype(np.float64).T @ coef  # dual vector: ⟂ to every other memory
        uu = float(u @ u)
        _add_scaled_outer(self._w, u, uu, subtract=True)
        self.diagonal_ -= u * u / uu
        self._bits = np.delete(self._bits, i, axis=0)
        self._set_diagonal()
        return self


def default_beta(n_units: int) -> float:
    """Default inverse temperature of the dense rule for N units: clip(√N, 20, 80).

    The dense rule's logits are β times the overlap over the cue's known units. Chance
    overlaps have standard deviation 1/√N, so with β = √N their spread contributes
    β²/(2N) = ½ nat to the log-partition function, whatever N: the softmax then picks the
    best-matching memory whenever its lead over the chance level is a few 1/√N. The clip
    keeps β in the range that worked on real records (20 to 80).
    """
    n = check_int(n_units, "n_units", low=1, high=1 << 20)
    return float(min(80.0, max(20.0, math.sqrt(n))))


def _best_weights_py(dots, betas, rows, out):  # type: ignore[no-untyped-def]  # pragma: no cover - compiled
    # the softmax weight of row rows[k]'s largest entry: 1 / Σ_μ exp(β_i dots[i, μ] − max)
    for k in range(rows.shape[0]):
        i = rows[k]
        beta = betas[i]
        top = -np.inf
        for j in range(dots.shape[1]):
            z = dots[i, j] * beta
            if z > top:
                top = z
        total = 0.0
        for j in range(dots.shape[1]):
            total += np.float64(np.exp(dots[i, j] * beta - top))
        out[k] = np.float32(1.0 / total)


_best_weights = compile_kernel(
    _best_weights_py, signature="void(float32[:, ::1], float32[::1], int64[::1], float32[::1])"
)


class DenseRule(MemoryRule):
    """Modern (dense) Hopfield memory: ξ ← sign(Xᵀ softmax(β X ξ / n_known)).

    The update of Ramsauer et al. (2020), followed by the sign for a binary state. The
    logits are β times the overlap of the state with each memory measured over the cue's
    known units, so one β serves cues of every shape. Capacity grows exponentially in N,
    far past the matrix rules.

    Large β makes the softmax nearly one-hot, so the readout only touches the memories whose
    softmax weight is above ``readout_tolerance / n_memories``; the weight left out can move a
    local field by at most ``readout_tolerance``. A recall then costs about one pass over X.
    When the softmax is one-hot within that tolerance, the readout is the winning pattern
    itself and no exponential is taken at all.

    The energy reported is the log-sum-exp energy E = -(1/β') log Σ_μ exp(β' x_μ·s) with
    β' = β / n_known; the sign update never raises it (it maximises the linearisation of a
    convex function over the hypercube).

    Parameters
    ----------
    beta : float or None, default None
        Inverse temperature; None means :func:`default_beta` of N.
    readout_tolerance : float, default 1e-6
        Softmax mass that may be skipped in the readout.
    """

    name = "dense"

    def __init__(self, *, beta: float | None = None, readout_tolerance: float = 1e-6) -> None:
        self.beta = None if beta is None else check_float(beta, "beta", low=0.0, low_open=True)
        self.readout_tolerance = check_float(
            readout_tolerance, "readout_tolerance", low=0.0, high=0.5
        )

    def get_params(self) -> dict[str, Any]:
        return {"beta": self.beta, "readout_tolerance": self.readout_tolerance}

    # Two copies of the patterns: float32 rows for the readout and the fields (gathers and,
    # for the rare state that is not one-hot, a weighted sum), and the same rows as bits, a
    # thirty-second of the bytes, that every dot product X s is counted on (bits.packed_dots).
    _x: F32
    _bits: NDArray[np.uint8]

    def _has_patterns(self) -> bool:
        return getattr(self, "_x", None) is not None

    def _pattern_store(self) -> NDArray[Any]:
        return self._x

    def _set_patterns(self, patterns: I8) -> None:
        self._x = np.ascontiguousarray(patterns, dtype=np.float32)
        self._bits = pack(patterns)

    def _decode_patterns(self) -> I8:
        return self._x.astype(np.int8)  # ±1.0 converts exactly

    def _pattern_shape(self) -> tuple[int, int]:
        return int(self._x.shape[0]), int(self._x.shape[1])

    def fit(self, patterns: Any) -> Self:
        """Store an (n_memories, n_units) matrix of ±1 values."""
        X = as_patterns(patterns, "patterns")
        self._set_patterns(X)
        self.beta_ = self.beta if self.beta is not None else default_beta(X.shape[1])
        return self

    @property
    def patterns_f32_(self) -> F32:
        """The stored patterns as float32: the array recall multiplies by, not a copy."""
        self._require_fitted()
        return self._x

    def pattern_dots(self, states: F32) -> F32:
        """x_μ · s for every stored pattern and state: one product with the kept patterns."""
        self._require_fitted()
        return self._dots(states)

    def add(self, pattern: Any) -> Self:
        """Store one more pattern (O(P N): the rows move to a new array one row longer)."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        self._x = np.concatenate([self._x, x.astype(np.float32)])
        self._bits = np.concatenate([self._bits, pack(x)])
        return self

    def remove(self, index: int) -> Self:
        """Forget the memory at row ``index``."""
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        self._x = np.delete(self._x, i, axis=0)
        self._bits = np.delete(self._bits, i, axis=0)
        return self

    def _dots(self, states: NDArray[Any]) -> F32:
        """X s for each state, shape (n_states, n_memories): exact integers in float32,
        counted on the packed patterns (several times faster than the float32 product at
        every batch size measured, see :mod:`service.engine.bits`)."""
        return packed_dots(states, self._bits, self.n_units_)

    def _betas(self, states: F32, n_known: NDArray[np.int64] | None) -> NDArray[np.float32]:
        if n_known is None:
            n_known = np.count_nonzero(states, axis=1)
        known = np.maximum(np.asarray(n_known, dtype=np.float32), 1.0)
        return np.asarray(np.float32(self.beta_) / known, dtype=np.float32)

    def logits(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        """β' X s for each state, shape (n_states, n_memories)."""
        self._require_fitted()
        dots = self._dots(states)
        dots *= self._betas(states, n_known)[:, None]
        return dots

    def softmax(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        """Softmax weights over the memories, shape (n_states, n_memories)."""
        z = self.logits(states, n_known)
        z -= z.max(axis=1, keepdims=True)
        np.exp(z, out=z)
        z /= z.sum(axis=1, keepdims=True)
        return z

    def local_fields(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        """Xᵀ softmax(β' X s), reading only memories with non-negligible weight."""
        return self._fields(states, n_known)[0]

    def _one_hot_gap(self, betas: NDArray[np.float32]) -> NDArray[np.float64]:
        """Dot-product lead past which the best memory alone carries the readout.

        A memory trailing the best by more than this has softmax weight below
        tolerance / (2 P) whatever the others do (the best one alone puts 1 in the
        normaliser), so the sparse readout would skip it too, and all of them together move
        a field by less than the tolerance. The slack of 1e-3 nat covers float32 rounding.
        """
        return np.asarray(self._one_hot_nats() / betas.astype(np.float64))

    def _one_hot_nats(self) -> float:
        """The lead of :meth:`_one_hot_gap` in nats (β' times the dot-product lead)."""
        if self.readout_tolerance == 0.0:
            return math.inf
        return math.log(2.0 * self.n_memories_ / self.readout_tolerance) + 1e-3

    def _winners(
        self, states: F32, n_known: NDArray[np.int64] | None
    ) -> tuple[F32, NDArray[np.intp], F64, F64, NDArray[np.bool_], NDArray[np.float32]]:
        """Dot products X s, each state's best memory, runner-up and best dot products,
        whether its readout is one-hot (see :meth:`_one_hot_gap`), and its β'."""
        self._require_fitted()
        return self._rank(self._dots(states), self._betas(states, n_known))

    def _rank(
        self, dots: F32, betas: NDArray[np.float32]
    ) -> tuple[F32, NDArray[np.intp], F64, F64, NDArray[np.bool_], NDArray[np.float32]]:
        """:meth:`_winners` from dot products already counted (``dots`` is handed back, its
        values as they were)."""
        best, top32, runner32, _, _ = top2(dots)  # runner: -inf with one memory
        top, runner = top32.astype(np.float64), runner32.astype(np.float64)
        one_hot = runner < top - self._one_hot_gap(betas)
        return dots, best, runner, top, one_hot, betas

    def _fields(
        self,
        states: F32,
        n_known: NDArray[np.int64] | None,
        *,
        signs_only: bool = False,
        winners: tuple[Any, ...] | None = None,
    ) -> tuple[F32, NDArray[np.intp], F64, F64, F32]:
        """Local fields, each state's winning memory (-1 unless one-hot), runner-up and best
        dot products, and all the dot products X s (left as computed).

        A near one-hot softmax is the common case at the default β, and there the readout
        is the winning pattern itself: two reductions over the dot products replace the
        exponentials, the normalisation and the gather. Other states take the full path.

        With ``signs_only`` (what the sign update needs), a state whose best memory holds
        more than half the softmax weight gets that pattern in place of its fields: the
        others together weigh less than it, so no unit's field can change sign,
        and the readout product is skipped. The margin of 1e-3 dwarfs the float32 rounding of
        the weights and the readout tolerance. Those states are not reported as winners.
        """
        if winners is None:  # else what :meth:`_winners` gave for these very states
            winners = self._winners(states, n_known)
        dots, best, runner, top, one_hot, betas = winners
        n_states = dots.shape[0]
        slow = np.flatnonzero(~one_hot)
        if slow.size == 0:  # the common case: one gather, no masked copy
            return self._x[best], best, runner, top, dots
        fields = np.empty((n_states, self._x.shape[1]), dtype=np.float32)
        fields[one_hot] = self._x[best[one_hot]]
        if signs_only:
            dominant = self._dominant(dots, betas, slow)
            fields[slow[dominant]] = self._x[best[slow[dominant]]]
            slow = slow[~dominant]
        if slow.size:
            fields[slow] = self._readout(self._weights(dots, betas, slow))
        winner = np.where(one_hot, best, -1)
        return fields, winner, runner, top, dots

    def _weights(self, dots: F32, betas: NDArray[np.float32], rows: NDArray[np.intp]) -> F32:
        """Softmax weights over the memories of the states ``rows`` (a copy of their dot
        products: ``dots`` stays as it is)."""
        z = dots[rows]
        z *= betas[rows][:, None]
        z -= z.max(axis=1, keepdims=True)
        np.exp(z, out=z)
        z /= z.sum(axis=1, keepdims=True)
        return z

    def _dominant(
        self, dots: F32, betas: NDArray[np.float32], rows: NDArray[np.intp]
    ) -> NDArray[np.bool_]:
        """Whether each of the states ``rows`` has its best memory holding more than half the
        softmax weight (see :meth:`_fields`): their sign update is that memory's pattern.

        The best memory's weight is exp(0) / Σ exp(β'(x_μ·s) − max), the softmax of
        :meth:`_weights` read at its maximum; one compiled pass per state sums it (in float64,
        from float32 terms) without building the weights.
        """
        weight = np.empty(rows.size, dtype=np.float32)
        if rows.size:
            _best_weights(
                np.ascontiguousarray(dots, dtype=np.float32),
                np.ascontiguousarray(betas, dtype=np.float32),
                np.ascontiguousarray(rows, dtype=np.int64),
                weight,
            )
        return np.asarray(weight > np.float32(0.5 + 1e-3))

    def _readout(self, a: F32) -> F32:
        """``a @ X`` over the weights above ``readout_tolerance / P``, by :func:`exact_readout`.

        The dropped weights move a field by less than the tolerance all together; kept, they
        would be float32 subnormals (a softmax's far tail), which slow a product many times
        over. Up to :data:`FULL_READOUT_MAX_MEMORIES` memories it is one product over all of
        them; above it each state on its own from only the memories it weighs. Only states
        whose readout is not one-hot come here.
        """
        n_states, n_mem = a.shape
        keep = a > np.float32(self.readout_tolerance / n_mem)
        if n_mem <= FULL_READOUT_MAX_MEMORIES:
            return exact_readout(np.where(keep, a, np.float32(0.0)), self._x)
        out = np.empty((n_states, self._x.shape[1]), dtype=np.float32)
        for i in range(n_states):
            cols = np.flatnonzero(keep[i])
            out[i] = exact_readout(a[i : i + 1, cols], self._x[cols])[0]
        return out

    def energy(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F64:
        """Log-sum-exp energy -(1/β') log Σ_μ exp(β' x_μ·s), shape (n_states,)."""
        z = self.logits(states, n_known).astype(np.float64)
        zmax = z.max(axis=1)
        lse = zmax + np.log(np.exp(z - zmax[:, None]).sum(axis=1))
        betas = self._betas(states, n_known).astype(np.float64)
        return np.asarray(-lse / betas)

    def unit_weights(self, unit: int) -> F32:
        raise NotImplementedError("the dense rule has no weight matrix")

    def self_coupling(self) -> F32:
        return np.zeros(self.n_units_, dtype=np.float32)

    def checksum(self) -> str:
        """Digest of the int8 patterns and β, converted and hashed a block of rows at a time."""
        self._require_fitted()
        h = hashlib.blake2b(digest_size=32)
        _hash_header(h, np.dtype(np.int8), self._x.shape)
        p, n = self._x.shape
        step = _block_rows(p, n)
        for lo in range(0, p, step):
            h.update(self._x[lo : lo + step].astype(np.int8).tobytes())
        beta = np.array([self.beta_])
        _hash_header(h, beta.dtype, beta.shape)
        h.update(beta.tobytes())
        return h.hexdigest()

    @property
    def weight_bytes_(self) -> int:
        """Bytes of the float32 patterns, the array the readout reads (the bits beside it,
        a thirty-second more, are counted in ``held_bytes_``)."""
        self._require_fitted()
        return int(self._x.nbytes)


RULE_NAMES: tuple[str, ...] = ("hebbian", "storkey", "projection", "dense")
_RULES: dict[str, type[MemoryRule]] = {
    "hebbian": HebbianRule,
    "storkey": StorkeyRule,
    "projection": ProjectionRule,
    "dense": DenseRule,
}


def make_rule(name: str, **options: Any) -> MemoryRule:
    """Build an unfitted rule by name with its options.

    Examples
    --------
    >>> make_rule("dense", beta=40.0).beta
    40.0
    >>> make_rule("oja")
    Traceback (most recent call last):
        ...
    service.engine.errors.ParameterError: rule must be one of hebbian, storkey, ...; got 'oja'
    """
    if not isinstance(name, str) or name not in _RULES:
        raise ParameterError(f"rule must be one of {', '.join(RULE_NAMES)}; got {name!r}")
    cls = _RULES[name]
    try:
        return cls(**options)
    except TypeError:
        allowed = sorted(cls().get_params())
        bad = sorted(set(options) - set(allowed))
        raise ParameterError(
            f"rule {name!r} has no option {', '.join(map(repr, bad))}; "
            f"its options are: {', '.join(allowed) or 'none'}"
        ) from None
