"""Capacity report: how close a compiled memory is to what its learning rule can hold.

The report measures the memory itself (which stored patterns are fixed points, how many bits
are unstable, how correlated the patterns are) and sets beside it what theory predicts for
random patterns at the same load α = P/N:

* Hebbian one-step bit-error probability P_err = ½ erfc(1/√(2α)) (signal 1 against crosstalk
  of variance α; Hertz, Krogh & Palmer 1991, ch. 2) and the critical load α_c ≈ 0.138
  (Amit, Gutfreund & Sompolinsky 1985, 1987);
* Storkey's rule holds about N / √(2 ln N) random patterns (Storkey 1997);
* the projection rule stores any linearly independent set, so at most N patterns (Personnaz,
  Guyon & Dreyfus 1985), with basins that shrink as α → 1 (Kanter & Sompolinsky 1987);
* the dense rule's capacity grows exponentially in N (Ramsauer et al. 2020).

Correlated patterns break the random-pattern figures. In the Hebbian local field
h_i = ξ^μ_i + Σ_{ν≠μ} ξ^ν_i m_νμ the crosstalk of P patterns whose mean pairwise overlap is ρ
grows like (P − 1) ρ, against √(P/N) for random patterns and a signal of 1. The report gives
this *correlation load* (P − 1) ρ and flags the memories as correlated when it passes ½ or when
the mean |overlap| is over four times the chance level 1/√N.

Examples
--------
>>> import numpy as np
>>> from service.engine import HebbianRule, capacity_report
>>> X = np.where(np.random.default_rng(0).random((30, 200)) < 0.5, -1, 1)
>>> report = capacity_report(HebbianRule().fit(X))
>>> report.load, report.fixed_point_fraction
(0.15, ...)
>>> "past its capacity" in report.advice
True
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ._checks import check_float, check_int
from .rules import DenseRule, MemoryRule, check_fitted_rule

__all__ = ["HEBBIAN_CRITICAL_LOAD", "CapacityReport", "capacity_report", "hebbian_bit_error"]

#: α_c for the Hebbian rule with random patterns (Amit, Gutfreund & Sompolinsky 1985).
HEBBIAN_CRITICAL_LOAD = 0.138


def hebbian_bit_error(load: float) -> float:
    """One-step bit-error probability ½ erfc(1/√(2α)) of the Hebbian rule at load α.

    >>> round(hebbian_bit_error(0.138), 4)
    0.0036
    """
    load = check_float(load, "load", low=0.0)
    if load == 0:
        return 0.0
    return 0.5 * math.erfc(1.0 / math.sqrt(2.0 * load))


def storkey_capacity(n_units: int) -> float:
    """Storkey's capacity estimate N / √(2 ln N) for random patterns."""
    n = max(int(n_units), 3)
    return n / math.sqrt(2.0 * math.log(n))


@dataclass(frozen=True)
class CapacityReport:
    """What a compiled memory holds and how close it is to its rule's limits."""

    rule: str
    n_units: int
    n_memories: int
    load: float
    mean_overlap: float
    mean_abs_overlap: float
    max_abs_overlap: float
    correlation_load: float
    chance_overlap: float
    duplicates: int
    checked_memories: int
    fixed_point_fraction: float
    unstable_bit_fraction: float
    predicted_bit_error: float
    rule_capacity: float
    capacity_used: float
    correlated: bool
    recommended_rule: str
    advice: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _pair_stats(
    X: NDArray[np.int8], rng: np.random.Generator, limit: int
) -> tuple[float, float, float, int]:
    """Mean signed and absolute overlap, max |overlap| between distinct patterns; duplicates."""
    p, n = X.shape
    # rows hashed as bytes: far cheaper than np.unique's lexicographic sort of whole rows
    uniq = len({row.tobytes() for row in X})
    duplicates = p - uniq
    if p < 2:
        return 0.0, 0.0, 0.0, duplicates
    idx = np.arange(p) if p <= limit else np.sort(rng.choice(p, size=limit, replace=False))
    xs = X[idx].astype(np.float32)
    g = (xs @ xs.T) / np.float32(n)
    np.fill_diagonal(g, np.nan)
    return (
        float(np.nanmean(g)),
        float(np.nanmean(np.abs(g))),
        float(np.nanmax(np.abs(g))),
        duplicates,
    )


def _stability(rule: MemoryRule, X: NDArray[np.int8]) -> tuple[float, float]:
    """Fraction of the given patterns that one sync step leaves unchanged, and of unstable bits."""
    fixed = 0
    unstable = 0
    for start in range(0, X.shape[0], 512):
        xs = X[start : start + 512].astype(np.float32)
        h = rule.local_fields(xs, np.full(xs.shape[0], xs.shape[1], dtype=np.int64))
        # a unit is stable when its field agrees with it (a zero field keeps the unit: stable)
        bad = (h * xs) < 0
        unstable += int(bad.sum())
        fixed += int((~bad.any(axis=1)).sum())
    return fixed / X.shape[0], unstable / X.size


def capacity_report(rule: MemoryRule, *, sample: int = 2000, seed: int = 0) -> CapacityReport:
    """Measure a fitted rule's memory and compare it with its rule's capacity.

    Parameters
    ----------
    rule : MemoryRule
        A fitted rule.
    sample : int
        At most this many memories are checked for stability and for pairwise overlap
        (chosen with ``seed``); the report says how many were checked.
    seed : int
    """
    check_fitted_rule(rule)
    n_check = check_int(sample, "sample", low=1, high=1_000_000)
    check_int(seed, "seed", low=0, high=2**63 - 1)
    X = rule.patterns_
    rng = np.random.default_rng(seed)
    p, n = X.shape
    load = p / n
    mean_signed, mean_ov, max_ov, dups = _pair_stats(X, rng, n_check)
    # the dense rule's stability check costs a softmax over all memories per pattern; a
    # smaller sample says the same thing there (its stored patterns are fixed points unless
    # near-duplicates compete)
    n_stab = min(n_check, 500) if isinstance(rule, DenseRule) else n_check
    idx = np.arange(p) if p <= n_stab else np.sort(rng.choice(p, size=n_stab, replace=False))
    fixed_frac, unstable_frac = _stability(rule, X[idx])
    chance = 1.0 / math.sqrt(n)
    # Random patterns have mean |overlap| ≈ √(2/π)/√N and a signed mean near 0.
    corr_load = (p - 1) * mean_signed
    correlated = corr_load > 0.5 or mean_ov > 4.0 * chance

    name = rule.name
    if name == "hebbian":
        cap = HEBBIAN_CRITICAL_LOAD * n
    elif name == "storkey":
        cap = storkey_capacity(n)
    elif name == "projection":
        cap = float(n)
    else:
        cap = math.inf
    used = p / cap if math.isfinite(cap) else 0.0

    recommended, advice = _advise(
        rule, load, used, cap, correlated, mean_signed, corr_load, fixed_frac, dups
    )
    return CapacityReport(
        rule=name,
        n_units=n,
        n_memories=p,
        load=load,
        mean_overlap=mean_signed,
        mean_abs_overlap=mean_ov,
        max_abs_overlap=max_ov,
        correlation_load=corr_load,
        chance_overlap=chance,
        duplicates=dups,
        checked_memories=int(idx.size),
        fixed_point_fraction=fixed_frac,
        unstable_bit_fraction=unstable_frac,
        predicted_bit_error=hebbian_bit_error(load),
        rule_capacity=cap if math.isfinite(cap) else -1.0,
        capacity_used=used,
        correlated=correlated,
        recommended_rule=recommended,
        advice=advice,
    )


def _advise(
    rule: MemoryRule,
    load: float,
    used: float,
    cap: float,
    correlated: bool,
    mean_ov: float,
    corr_load: float,
    fixed_frac: float,
    dups: int,
) -> tuple[str, str]:
    name = rule.name
    parts: list[str] = []
    if name in ("hebbian", "storkey"):
        cap_load = cap / rule.n_units_
        if used > 1.0:
            parts.append(
                f"{name} at load {load:.2f} is past its capacity of about {cap_load:.3f} N"
            )
        elif used > 0.8:
            parts.append(
                f"{name} at load {load:.2f} is near its capacity of about {cap_load:.3f} N"
            )
        if correlated:
            parts.append(
                f"the memories are correlated (mean overlap {mean_ov:.3f}; crosstalk "
                f"(P-1)·overlap = {corr_load:.1f} against a signal of 1), which the {name} "
                "rule cannot store"
            )
    elif name == "projection":
        if used > 0.5:
            parts.append(
                f"projection at load {load:.2f} holds its memories as fixed points, but their "
                "basins shrink as the load approaches 1"
            )
    if fixed_frac < 0.99 and not isinstance(rule, DenseRule):
        parts.append(f"only {fixed_frac:.0%} of the checked memories are fixed points")
    if dups:
        parts.append(f"{dups} memories are exact duplicates of others")

    if name == "dense":
        recommended = "dense"
    elif (name == "projection" and load <= 0.5) or (not correlated and used <= 0.8):
        recommended = name
    elif load <= 0.5:
        recommended = "projection"
    else:
        recommended = "dense"
    if recommended != name:
        alt = "projection or dense" if recommended == "projection" else "dense"
        parts.append(f"use {alt}")
    if not parts:
        return recommended, f"{name} at load {load:.2f} is well within its capacity"
    return recommended, "; ".join(parts)
