"""Verdicts: what a settled state means, judged from its overlaps with the stored memories.

For each cue, with X the stored patterns and s the settled state,

* overlap m_μ = (1/N) Σ_i ξ^μ_i s_i with every memory; the best memory μ* and the margin
  m* − m₂ to the runner-up;
* cue overlap c_μ = (1/n) Σ_{i known} ξ^μ_i c_i over the cue's n known units, and the **cue
  margin** c_(1) − c_(2): how clearly the cue itself points at one memory;
* cue agreement a = (1/n) Σ_{i known} s_i c_i: whether the settled state still fits the cue;
* field agreement f = the least, over the cue's known fields (``blocks``), of the same
  agreement measured on that field's block alone. A fragment of a stored record agrees on every
  field it gives (a typo or a jittered number lowers one field a little); a fragment of a record
  that is not stored usually matches its nearest memory on some fields and not at all on another.

The verdict, checked in this order:

=========== ============ ==========================================================
verdict     reason       when
=========== ============ ==========================================================
unsettled   cycle        the dynamics entered a 2-cycle
unsettled   step_limit   no fixed point within the step limit
spurious    reversed     the state is close to the negative of a memory (m ≤ −θ_m)
spurious    mixture      m* < θ_m and at least two memories overlap above the chance
                         ceiling (a blend of memories, e.g. the symmetric 3-mixture)
spurious    far          m* < θ_m otherwise (a spin-glass state), or the agreement with
                         the cue is below θ_a, or the field agreement below θ_f (the
                         fragment fits no stored memory)
spurious    ambiguous    the cue margin is below θ_c: the fragment fits several memories
recalled    clean        everything above holds
=========== ============ ==========================================================

Default thresholds come from the chance level. For a state unrelated to the memories each
overlap is a sum of n independent ±1/n terms, so it has standard deviation 1/√n; the largest
of P such overlaps is about √(2 ln P / n) (the Gaussian extreme-value estimate). Hence:

* θ_m (recall overlap) = clip(1 − 10/√N, 0.7, 0.95): the state is within 5√N flipped bits of a
  memory, which no chance overlap reaches, and above the ½ of a 3-mixture.
* chance ceiling on n units = √(2 ln(2P) / n) + 3/√n: a memory overlapping more than this is
  really present (used for θ_a and for telling mixtures from spin-glass states).
* θ_c (cue margin) = 3 √2 / √n: the difference of two independent chance overlaps has
  standard deviation √2/√n; a lead smaller than three of them is not a lead.

Collections of real records are correlated, so the service calibrates θ_a and θ_c on the
collection's own data (see :mod:`service.engine.calibration`); the defaults are for random-like
patterns.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ._checks import as_cues, as_patterns, check_float, check_int
from .bits import compile_kernel
from .dynamics import SettleResult
from .errors import ParameterError, ShapeError
from .rows import best_k, top2
from .rules import MemoryRule, check_fitted_rule

__all__ = [
    "REASONS",
    "VERDICTS",
    "Verdict",
    "VerdictBatch",
    "VerdictThresholds",
    "chance_ceiling",
    "judge",
]

VERDICTS: tuple[str, ...] = ("recalled", "spurious", "unsettled")
REASONS: dict[str, tuple[str, ...]] = {
    "recalled": ("clean",),
    "spurious": ("reversed", "mixture", "far", "ambiguous"),
    "unsettled": ("cycle", "step_limit"),
}


def chance_ceiling(n_memories: int, n_units: int) -> float:
    """Overlap above which a memory is really present, for P memories and n units.

    √(2 ln(2P) / n) + 3/√n: the expected largest of P chance overlaps plus three standard
    deviations.

    >>> round(chance_ceiling(100, 1000), 3)
    0.198
    """
    n = max(int(n_units), 1)
    p = max(int(n_memories), 1)
    return math.sqrt(2.0 * math.log(2.0 * p) / n) + 3.0 / math.sqrt(n)


@functools.lru_cache(maxsize=4096)
def _chance_ceiling(n_memories: int, n_units: float) -> float:
    # cues of a collection know a few distinct numbers of units: worth remembering
    return chance_ceiling(n_memories, int(n_units))


@dataclass(frozen=True)
class VerdictThresholds:
    """Thresholds of the verdict; None means the chance-derived default (see module doc).

    Parameters
    ----------
    recall_overlap : float or None
        θ_m, the least overlap of the settled state with its best memory.
    min_agreement : float or None
        θ_a, the least agreement between the settled state and the cue on its known units.
    min_cue_margin : float or None
        θ_c, the least lead of the cue's best memory over the runner-up.
    min_field_agreement : float or None
        θ_f, the least agreement on any one known field (used only when ``judge`` is given the
        field blocks; None means no field check).
    """

    recall_overlap: float | None = None
    min_agreement: float | None = None
    min_cue_margin: float | None = None
    min_field_agreement: float | None = None

    def __post_init__(self) -> None:
        for name in ("recall_overlap", "min_agreement", "min_cue_margin", "min_field_agreement"):
            value = getattr(self, name)
            if value is not None:
                check_float(value, name, low=-1.0, high=2.0)

    def resolved_recall_overlap(self, n_units: int) -> float:
        if self.recall_overlap is not None:
            return self.recall_overlap
        return min(0.95, max(0.7, 1.0 - 10.0 / math.sqrt(n_units)))

    def to_dict(self) -> dict[str, float | None]:
        return {
            "recall_overlap": self.recall_overlap,
            "min_agreement": self.min_agreement,
            "min_cue_margin": self.min_cue_margin,
            "min_field_agreement": self.min_field_agreement,
        }


@dataclass(frozen=True)
class Verdict:
    """Verdict for one cue (one row of a :class:`VerdictBatch`)."""

    verdict: str
    reason: str
    best: int
    overlap: float
    margin: float
    cue_overlap: float
    cue_margin: float
    cue_agreement: float
    field_agreement: float
    nearest: list[tuple[int, float]] = field(default_factory=list)
    steps: int = 0
    converged: bool = True
    cycle_length: int = 0


@dataclass(frozen=True)
class VerdictBatch:
    """Verdicts for a batch of cues, as arrays (row i belongs to cue i).

    Attributes
    ----------
    verdict, reason : list of str
    best : ndarray of int64, shape (n_cues,)
        Index of the memory with the highest overlap with the settled state.
    overlap, margin : ndarray of float64
        m* and m* − m₂ of the settled state.
    cue_best : ndarray of int64
        Index of the memory the cue itself overlaps most.
    cue_overlap, cue_margin, cue_agreement : ndarray of float64
    nearest : ndarray of int64, shape (n_cues, k)
        The k memories nearest the settled state, best first; equal overlaps in memory order.
    nearest_overlap : ndarray of float64, shape (n_cues, k)
    """

    verdict: list[str]
    reason: list[str]
    best: NDArray[np.int64]
    overlap: NDArray[np.float64]
    margin: NDArray[np.float64]
    cue_best: NDArray[np.int64]
    cue_overlap: NDArray[np.float64]
    cue_margin: NDArray[np.float64]
    cue_agreement: NDArray[np.float64]
    field_agreement: NDArray[np.float64]
    nearest: NDArray[np.int64]
    nearest_overlap: NDArray[np.float64]
    steps: NDArray[np.int64]
    converged: NDArray[np.bool_]
    cycle_length: NDArray[np.int64]
    thresholds: dict[str, NDArray[np.float64]] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.verdict)

    def __getitem__(self, i: int) -> Verdict:
        return Verdict(
            verdict=self.verdict[i],
            reason=self.reason[i],
            best=int(self.best[i]),
            overlap=float(self.overlap[i]),
            margin=float(self.margin[i]),
            cue_overlap=float(self.cue_overlap[i]),
            cue_margin=float(self.cue_margin[i]),
            cue_agreement=float(self.cue_agreement[i]),
            field_agreement=float(self.field_agreement[i]),
            nearest=[
                (int(j), float(m))
                for j, m in zip(self.nearest[i], self.nearest_overlap[i], strict=True)
            ],
            steps=int(self.steps[i]),
            converged=bool(self.converged[i]),
            cycle_length=int(self.cycle_length[i]),
        )


def _top2(
    m: NDArray[np.float32], threshold: float = math.inf
) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], Any]:
    """Each row's best column, best value, second-best value (-1 with one column), least
    value and count of values at least ``threshold`` (see :func:`rows.top2`)."""
    best, top, runner, low, above = top2(m, threshold)
    second = runner.astype(np.float64) if m.shape[1] > 1 else np.full(m.shape[0], -1.0)
    return best, top.astype(np.float64), second, low.astype(np.float64), above


def judge(
    patterns: Any,
    cues: Any,
    result: SettleResult,
    thresholds: VerdictThresholds | None = None,
    *,
    top_k: int = 3,
    blocks: Sequence[slice] | None = None,
) -> VerdictBatch:
    """Judge settled states against the stored patterns.

    ``patterns`` may also be a fitted :class:`~service.engine.rules.MemoryRule`: its patterns
    were checked when it was fitted, so they are not checked again (on a large collection that
    check costs more than the verdict itself).

    Parameters
    ----------
    patterns : array_like, shape (n_memories, n_units)
        The stored ±1 patterns (``rule.patterns_``).
    cues : array_like, shape (n_cues, n_units)
        The cues the states were settled from (values in {-1, 0, +1}).
    result : SettleResult
        What :func:`~service.engine.dynamics.settle` returned for these cues.
    thresholds : VerdictThresholds, optional
    top_k : int
        How many nearest memories to list (1 to 100).
    blocks : sequence of slice, optional
        The fields' contiguous unit blocks; enables the field agreement check.

    Returns
    -------
    VerdictBatch
    """
    rule: MemoryRule | None = None
    if isinstance(patterns, MemoryRule):
        rule = check_fitted_rule(patterns)
        n_mem, n_units = rule.n_memories_, rule.n_units_
    else:
        xf = as_patterns(patterns, "patterns").astype(np.float32)
        n_mem, n_units = xf.shape
    c = as_cues(cues, "cues", n_units=n_units)
    if not isinstance(result, SettleResult):
        raise ParameterError(f"result must be what settle() returned, got {type(result).__name__}")
    if thresholds is not None and not isinstance(thresholds, VerdictThresholds):
        raise ParameterError(
            f"thresholds must be a VerdictThresholds, got {type(thresholds).__name__}"
        )
    states = as_cues(result.states, "result.states", n_units=n_units)
    if states.shape[0] != c.shape[0]:
        raise ShapeError(
            f"result has {states.shape[0]} states for {c.shape[0]} cues; they must match"
        )
    for name in ("steps", "converged", "cycle_length"):
        if np.shape(getattr(result, name)) != (c.shape[0],):
            raise ShapeError(
                f"result.{name} has shape {np.shape(getattr(result, name))}, "
                f"expected ({c.shape[0]},)"
            )
    k = min(check_int(top_k, "top_k", low=1, high=100), n_mem)
    th = thresholds or VerdictThresholds()

    sf = states.astype(np.float32)
    cf = c.astype(np.float32)
    n_known = np.maximum(np.count_nonzero(c, axis=1), 1).astype(np.float64)

    # States and cues in one product: one pass over the patterns instead of two (the dot
    # products are integers, exact in float32, so sharing the product changes no value).
    n_states = sf.shape[0]
    if rule is not None and result.cues is c and result.cue_dots is not None:
        # the settle run's own dot products: the cues', and the final states' where known
        dots: NDArray[np.float32] = np.empty((2 * n_states, n_mem), dtype=np.float32)
        dots[n_states:] = result.cue_dots
        known = result.state_dots_known
        if result.state_dots is not None and known is not None and known.any():
            dots[:n_states][known] = result.state_dots[known]
            missing = np.flatnonzero(~known)
        else:
            missing = np.arange(n_states)
        if missing.size:
            dots[missing] = rule.pattern_dots(sf[missing])
    else:
        both = np.concatenate([sf, cf])
        dots = rule.pattern_dots(both) if rule is not None else np.asarray(both @ xf.T)
    overlaps = dots[:n_states] / np.float32(n_units)  # (B, P), exact up to rounding of 1/N
    ceiling_state = chance_ceiling(n_mem, n_units)
    best, m_best, m_second, m_min, n_present = _top2(overlaps, ceiling_state)
    cue_ov = dots[n_states:] / n_known[:, None].astype(np.float32)
    cue_best, c_best, c_second, _, _ = _top2(cue_ov)
    agreement = np.einsum("ij,ij->i", sf, cf).astype(np.float64) / n_known
    field_agr = field_agreement(sf, cf, _check_blocks(blocks, n_units)) if blocks else agreement

    # the k nearest, nearest first, equal overlaps by memory index
    nearest, near_ov = best_k(overlaps, k)
    nearest_ov = near_ov.astype(np.float64)

    theta_m = th.resolved_recall_overlap(n_units)
    ceiling_cue = np.array([_chance_ceiling(n_mem, n) for n in n_known.tolist()])
    theta_a = (
        np.full(c.shape[0], th.min_agreement)
        if th.min_agreement is not None
        else np.minimum(ceiling_cue, 0.9)
    )
    theta_c = (
        np.full(c.shape[0], th.min_cue_margin)
        if th.min_cue_margin is not None
        else 3.0 * math.sqrt(2.0) / np.sqrt(n_known)
    )
    theta_f = th.min_field_agreement if th.min_field_agreement is not None else -np.inf

    verdict: list[str] = []
    reason: list[str] = []
    # the same comparisons on Python numbers (columns converted once, not scalar by scalar)
    for conv, cyc, lo, hi, present, agr, fagr, ta, cb, cs, tc in zip(
        np.asarray(result.converged).tolist(),
        np.asarray(result.cycle_length).tolist(),
        m_min.tolist(),
        m_best.tolist(),
        n_present.tolist(),
        agreement.tolist(),
        np.asarray(field_agr, dtype=np.float64).tolist(),
        np.asarray(theta_a, dtype=np.float64).tolist(),
        c_best.tolist(),
        c_second.tolist(),
        np.asarray(theta_c, dtype=np.float64).tolist(),
        strict=True,
    ):
        if not conv:
            verdict.append("unsettled")
            reason.append("cycle" if cyc > 0 else "step_limit")
        elif lo <= -theta_m and -lo > hi:
            verdict.append("spurious")
            reason.append("reversed")
        elif hi < theta_m:
            verdict.append("spurious")
            reason.append("mixture" if present >= 2 else "far")
        elif agr < ta or fagr < theta_f:
            verdict.append("spurious")
            reason.append("far")
        elif cb - cs < tc:
            verdict.append("spurious")
            reason.append("ambiguous")
        else:
            verdict.append("recalled")
            reason.append("clean")

    return VerdictBatch(
        verdict=verdict,
        reason=reason,
        best=best,
        overlap=m_best,
        margin=m_best - m_second,
        cue_best=cue_best,
        cue_overlap=c_best,
        cue_margin=c_best - c_second,
        cue_agreement=agreement,
        field_agreement=np.asarray(field_agr, dtype=np.float64),
        nearest=nearest,
        nearest_overlap=nearest_ov,
        steps=np.asarray(result.steps, dtype=np.int64),
        converged=np.asarray(result.converged, dtype=bool),
        cycle_length=np.asarray(result.cycle_length, dtype=np.int64),
        thresholds={
            "recall_overlap": np.full(c.shape[0], theta_m),
            "min_agreement": np.asarray(theta_a, dtype=np.float64),
            "min_cue_margin": np.asarray(theta_c, dtype=np.float64),
            "min_field_agreement": np.full(c.shape[0], theta_f),
        },
    )


def _check_blocks(blocks: Sequence[slice], n_units: int) -> list[slice]:
    out = []
    for b in blocks:
        if not isinstance(b, slice):
            raise ParameterError(f"blocks must be slices, got {type(b).__name__}")
        start, stop, step = b.indices(n_units)
        if step != 1 or stop <= start:
            raise ParameterError(f"block {b} is not a non-empty contiguous range of units")
        out.append(slice(start, stop))
    return out


def _field_agreement_py(states, cues, starts, stops, out):  # type: ignore[no-untyped-def]  # pragma: no cover - compiled
    # per state, the least over blocks of (Σ s·c over the block's known units) / their count
    for i in range(states.shape[0]):
        least = np.inf
        for j in range(starts.shape[0]):
            agree = 0
            known = 0
            for u in range(starts[j], stops[j]):
                c = cues[i, u]
                if c != 0:
                    known += 1
                    agree += int(states[i, u] * c)
            if known > 0:
                least = min(least, np.float64(agree) / np.float64(known))
        out[i] = least if least < np.inf else 1.0


_field_agreement = compile_kernel(
    _field_agreement_py,
    signature="void(float32[:, ::1], float32[:, ::1], int64[::1], int64[::1], float64[::1])",
)


def field_agreement(
    states: NDArray[np.float32], cues: NDArray[np.float32], blocks: Sequence[slice]
) -> NDArray[np.float64]:
    """Least per-block agreement of each state with its cue over the cue's known blocks.

    A cue with no known unit in a block leaves that block out; a cue with no known block at
    all gets 1.0 (nothing to disagree with).

    >>> import numpy as np
    >>> s = np.array([[1, 1, 1, 1]], dtype=np.float32)
    >>> c = np.array([[1, 1, -1, 0]], dtype=np.float32)
    >>> field_agreement(s, c, [slice(0, 2), slice(2, 4)]).tolist()
    [-1.0]
    """
    # One compiled pass: the sums are of -1, 0 and +1 terms, integers, and each block's
    # agreement is one float64 division of two of them, whatever the order of the terms.
    spans = [b.indices(states.shape[1]) for b in blocks]
    if any(step != 1 for _, _, step in spans):
        raise ParameterError("blocks must be contiguous ranges of units (slices with step 1)")
    bounds = np.array([(a, max(a, z)) for a, z, _ in spans], dtype=np.int64).reshape(-1, 2)
    out = np.empty(states.shape[0], dtype=np.float64)
    _field_agreement(
        np.ascontiguousarray(states, dtype=np.float32),
        np.ascontiguousarray(cues, dtype=np.float32),
        np.ascontiguousarray(bounds[:, 0]),
        np.ascontiguousarray(bounds[:, 1]),
        out,
    )
    return out
