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
from typing import Any, ClassVar, Self

import numpy as np
from numpy.typing import NDArray

from ._checks import as_patterns, check_float, check_int
from .errors import DependentMemoryError, EmptyMemoryError, ParameterError

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
        The stored memories, in the order they were fitted and added.
    """

    name: ClassVar[str] = ""
    #: Whether the weights are symmetric, which is what guarantees that ``async`` settling
    #: never raises the energy and ``sync`` ends in a fixed point or a 2-cycle.
    symmetric: ClassVar[bool] = True
    #: Whether :meth:`remove` forgets one memory incrementally (Storkey's rule cannot).
    supports_remove: ClassVar[bool] = True

    patterns_: I8

    @property
    def n_units_(self) -> int:
        """Number of units N."""
        self._require_fitted()
        return int(self.patterns_.shape[1])

    @property
    def n_memories_(self) -> int:
        """Number of stored memories P."""
        self._require_fitted()
        return int(self.patterns_.shape[0])

    @property
    def patterns_f32_(self) -> F32:
        """``patterns_`` as float32, for products; cached until the patterns change."""
        self._require_fitted()
        cached = getattr(self, "_pf32", None)
        if cached is None or getattr(self, "_pf32_src", None) is not self.patterns_:
            cached = self.patterns_.astype(np.float32)
            self._pf32 = cached
            self._pf32_src = self.patterns_
        return cached

    def _require_fitted(self) -> None:
        if getattr(self, "patterns_", None) is None:
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


def check_fitted_rule(rule: Any, name: str = "rule") -> MemoryRule:
    """Require a fitted :class:`MemoryRule`; anything else is an engine error, not a crash."""
    if not isinstance(rule, MemoryRule):
        raise ParameterError(
            f"{name} must be a fitted learning rule (see make_rule), got {type(rule).__name__}"
        )
    rule._require_fitted()
    return rule


def _digest(*arrays: NDArray[Any]) -> str:
    h = hashlib.blake2b(digest_size=32)
    for arr in arrays:
        a = np.ascontiguousarray(arr)
        h.update(str(a.dtype).encode())
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


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
        """Local fields h = s W for a batch of states, shape (n_states, n_units)."""
        self._require_fitted()
        h = states @ self._w
        if self._scale != 1.0:
            h *= np.float32(self._scale)
        return h

    def energy(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F64:
        """E = -½ sᵀ W s for each state, shape (n_states,)."""
        h = self.local_fields(states).astype(np.float64)
        return np.asarray(-0.5 * np.einsum("ij,ij->i", states.astype(np.float64), h))

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
        self.patterns_ = X
        self._w = np.ascontiguousarray(counts, dtype=np.float32)
        self._scale = 1.0 / X.shape[1]
        return self

    def add(self, pattern: Any) -> Self:
        """Store one more ±1 pattern of n_units values in O(N²)."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        xf = x[0].astype(np.float32)
        outer = np.multiply.outer(xf, xf)
        np.fill_diagonal(outer, 0.0)
        self._w += outer
        self.patterns_ = np.concatenate([self.patterns_, x])
        return self

    def remove(self, index: int) -> Self:
        """Forget the memory at row ``index`` of ``patterns_`` in O(N²)."""
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        xf = self.patterns_[i].astype(np.float32)
        outer = np.multiply.outer(xf, xf)
        np.fill_diagonal(outer, 0.0)
        self._w -= outer
        self.patterns_ = np.delete(self.patterns_, i, axis=0)
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
        self._off = np.zeros((n, n), dtype=np.float32)
        self.diagonal_ = np.zeros(n, dtype=np.float64)
        self.patterns_ = X[:0]
        for x in X:
            self._learn(x)
        self.patterns_ = X
        self._refresh()
        return self

    def add(self, pattern: Any) -> Self:
        """Learn one more pattern in O(N²); equal to fitting all patterns in this order."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        self._learn(x[0])
        self.patterns_ = np.concatenate([self.patterns_, x])
        self._refresh()
        return self

    def _learn(self, x8: I8) -> None:
        # With f = W ξ (zero diagonal) and ξ_k² = 1, h_ij = f_i − w_ij ξ_j, and the update
        # collapses to W ← (1 + 2/N) W + (1/N)(ξξᵀ − ξfᵀ − fξᵀ): three rank-one passes over
        # W instead of N×N temporaries for h. The diagonal (never used by h) is tracked apart.
        w = self._off
        x = x8.astype(np.float32)
        n = x.size
        f = w @ x
        self.diagonal_ += (1.0 - 2.0 * x.astype(np.float64) * f.astype(np.float64)) / n
        w *= np.float32(1.0 + 2.0 / n)
        w += np.multiply.outer(x / np.float32(n), x - f)
        w -= np.multiply.outer(f / np.float32(n), x)
        np.fill_diagonal(w, 0.0)

    def _refresh(self) -> None:
        if self.keep_diagonal:
            self._w = self._off.copy()
            self._w[np.diag_indices_from(self._w)] = self.diagonal_.astype(np.float32)
        else:
            self._w = self._off  # one matrix serves learning and recall

    def checksum(self) -> str:
        self._require_fitted()
        return _digest(self.patterns_, self._off, self.diagonal_)


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


class ProjectionRule(_MatrixRule):
    """Projection (pseudo-inverse) rule, W = Xᵀ (X Xᵀ)⁻¹ X.

    W projects onto the span of the stored patterns, so every linearly independent set of
    up to N patterns — correlated or not — is stored as fixed points (Personnaz, Guyon &
    Dreyfus 1985; Kanter & Sompolinsky 1987). The P×P Gram matrix G = X Xᵀ is formed in
    float64 and factored as G = L Lᵀ; then W = Yᵀ Y with Y = L⁻¹ X. No N×N inverse is formed.

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
        xd = X.astype(np.float64)
        gram = xd @ xd.T
        try:
            chol = np.linalg.cholesky(gram)
            ok = bool(np.all(np.diag(chol) ** 2 > self.tolerance * n))
        except np.linalg.LinAlgError:
            ok = False
        if not ok:
            self._raise_dependent(X)
        y = _solve_lower(chol, xd)  # Y = L⁻¹ X, shape (P, N)
        y32 = y.astype(np.float32)
        full = y32.T @ y32  # the N×N product in float32: the GEMM dominates the compile
        self.patterns_ = X
        self.gram_ = gram
        self.cholesky_ = chol
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

    def _residual(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        """x minus its projection on the stored patterns, in float64 through the factor."""
        xd = self.patterns_.astype(np.float64)
        g = xd @ x
        coef = _solve_lower(self.cholesky_, _solve_lower(self.cholesky_, g), transposed=True)
        return np.asarray(x - xd.T @ coef)

    def add(self, pattern: Any) -> Self:
        """Store one more pattern with a rank-one update of W and of the Cholesky factor."""
        self._require_fitted()
        x8 = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x8.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x8.shape[0]}")
        x = x8[0].astype(np.float64)
        p, n = self.patterns_.shape
        dup = np.flatnonzero((self.patterns_ == x8[0]).all(axis=1))
        if dup.size:
            raise DependentMemoryError(
                f"the new memory is identical to memory {int(dup[0])}; the projection rule "
                "stores each pattern once",
                indices=(int(dup[0]), p),
            )
        r = self._residual(x)
        d2 = float(r @ r)
        if d2 <= self.tolerance * n:
            # x is in the span, so its coefficients G⁻¹ X x are exact: name only the
            # memories that take part, as fit() does, not every stored one
            coef = _solve_lower(
                self.cholesky_, _solve_lower(self.cholesky_, self.patterns_ @ x), transposed=True
            )
            involved = tuple(int(k) for k in np.flatnonzero(np.abs(coef) > 1e-8))
            raise DependentMemoryError(
                f"the new memory (position {p}) is a linear combination of memories "
                f"{', '.join(map(str, involved))}; the projection rule needs linearly "
                "independent memories",
                indices=(*involved, p),
            )
        g = self.patterns_.astype(np.float64) @ x
        l_row = _solve_lower(self.cholesky_, g)
        chol = np.zeros((p + 1, p + 1))
        chol[:p, :p] = self.cholesky_
        chol[p, :p] = l_row
        chol[p, p] = math.sqrt(max(float(x @ x - l_row @ l_row), d2))
        gram = np.empty((p + 1, p + 1))
        gram[:p, :p] = self.gram_
        gram[p, :p] = gram[:p, p] = g
        gram[p, p] = x @ x
        self._w += (np.multiply.outer(r, r) / d2).astype(np.float32)
        self.diagonal_ += r * r / d2
        self._after_update(np.concatenate([self.patterns_, x8]), gram, chol)
        return self

    def remove(self, index: int) -> Self:
        """Forget one memory with a rank-one downdate of W (O(N² + P³))."""
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        e = np.zeros(self.n_memories_)
        e[i] = 1.0
        coef = _solve_lower(self.cholesky_, _solve_lower(self.cholesky_, e), transposed=True)
        u = self.patterns_.astype(np.float64).T @ coef  # dual vector: ⟂ to every other memory
        uu = float(u @ u)
        self._w -= (np.multiply.outer(u, u) / uu).astype(np.float32)
        self.diagonal_ -= u * u / uu
        gram = np.delete(np.delete(self.gram_, i, axis=0), i, axis=1)
        chol = np.asarray(np.linalg.cholesky(gram), dtype=np.float64)
        self._after_update(np.delete(self.patterns_, i, axis=0), gram, chol)
        return self

    def _after_update(self, patterns: I8, gram: F64, chol: F64) -> None:
        self.patterns_ = patterns
        self.gram_ = gram
        self.cholesky_ = chol
        self._set_diagonal()

    @property
    def weight_bytes_(self) -> int:
        self._require_fitted()
        return int(self._w.nbytes + self.gram_.nbytes + self.cholesky_.nbytes)


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

    def fit(self, patterns: Any) -> Self:
        """Store an (n_memories, n_units) matrix of ±1 values."""
        X = as_patterns(patterns, "patterns")
        self.patterns_ = X
        self._x = X.astype(np.float32)
        self.beta_ = self.beta if self.beta is not None else default_beta(X.shape[1])
        return self

    @property
    def patterns_f32_(self) -> F32:
        self._require_fitted()
        return self._x

    def add(self, pattern: Any) -> Self:
        """Store one more pattern (O(N))."""
        self._require_fitted()
        x = as_patterns(pattern, "pattern", n_units=self.n_units_)
        if x.shape[0] != 1:
            raise ParameterError(f"add() takes one pattern, got {x.shape[0]}")
        self.patterns_ = np.concatenate([self.patterns_, x])
        self._x = np.concatenate([self._x, x.astype(np.float32)])
        return self

    def remove(self, index: int) -> Self:
        """Forget the memory at row ``index``."""
        self._require_fitted()
        i = check_int(index, "index", low=0, high=self.n_memories_ - 1)
        if self.n_memories_ == 1:
            raise EmptyMemoryError("cannot remove the only memory; a rule needs at least one")
        self.patterns_ = np.delete(self.patterns_, i, axis=0)
        self._x = np.delete(self._x, i, axis=0)
        return self

    def _betas(self, states: F32, n_known: NDArray[np.int64] | None) -> NDArray[np.float32]:
        if n_known is None:
            n_known = np.count_nonzero(states, axis=1)
        known = np.maximum(np.asarray(n_known, dtype=np.float32), 1.0)
        return np.asarray(np.float32(self.beta_) / known, dtype=np.float32)

    def logits(self, states: F32, n_known: NDArray[np.int64] | None = None) -> F32:
        """β' X s for each state, shape (n_states, n_memories)."""
        self._require_fitted()
        dots = states @ self._x.T  # exact integers in float32
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
        if self.readout_tolerance == 0.0:
            return np.full(betas.shape, np.inf)
        nats = math.log(2.0 * self.n_memories_ / self.readout_tolerance) + 1e-3
        return np.asarray(nats / betas.astype(np.float64))

    def _fields(
        self, states: F32, n_known: NDArray[np.int64] | None
    ) -> tuple[F32, NDArray[np.intp], F64]:
        """Local fields, each state's winning memory (-1 unless one-hot) and runner-up dot.

        A near one-hot softmax is the common case at the default β, and there the readout
        is the winning pattern itself: two reductions over the dot products replace the
        exponentials, the normalisation and the gather. Other states take the full path.
        """
        self._require_fitted()
        betas = self._betas(states, n_known)
        dots = states @ self._x.T  # exact integers in float32
        n_states, n_mem = dots.shape
        rows = np.arange(n_states)
        best = np.asarray(dots.argmax(axis=1))
        top = dots[rows, best].astype(np.float64)
        if n_mem > 1:
            dots[rows, best] = -np.inf
            runner = dots.max(axis=1).astype(np.float64)
            dots[rows, best] = top
        else:
            runner = np.full(n_states, -np.inf)
        one_hot = runner < top - self._one_hot_gap(betas)
        fields = np.empty((n_states, self._x.shape[1]), dtype=np.float32)
        fields[one_hot] = self._x[best[one_hot]]
        slow = np.flatnonzero(~one_hot)
        if slow.size:
            z = dots if slow.size == n_states else dots[slow]
            z *= betas[slow][:, None]
            z -= z.max(axis=1, keepdims=True)
            np.exp(z, out=z)
            z /= z.sum(axis=1, keepdims=True)
            fields[slow] = self._readout(z)
        winner = np.where(one_hot, best, -1)
        return fields, winner, runner

    def _readout(self, a: F32) -> F32:
        n_states, n_mem = a.shape
        keep = a > np.float32(self.readout_tolerance / n_mem)
        n_kept = int(np.count_nonzero(keep))
        if n_kept * 4 >= a.size:  # most memories matter: one GEMM is cheaper than gathering
            return np.asarray(a @ self._x, dtype=np.float32)
        rows, cols = np.nonzero(keep)  # row-major, so each cue's entries are contiguous
        contrib = self._x[cols] * a[rows, cols][:, None]
        starts = np.flatnonzero(np.r_[True, rows[1:] != rows[:-1]])
        out = np.zeros((n_states, self._x.shape[1]), dtype=np.float32)
        out[rows[starts]] = np.add.reduceat(contrib, starts, axis=0)
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
        self._require_fitted()
        return _digest(self.patterns_, np.array([self.beta_]))

    @property
    def weight_bytes_(self) -> int:
        self._require_fitted()
        return int(self._x.nbytes + self.patterns_.nbytes)


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
