"""Calibrate a collection's verdict thresholds on its own records.

Real records are correlated (many share a site, a collector, a category), so the chance-level
defaults of :mod:`service.engine.verdict` do not say when a cue fits no record or several. At
compile time the service estimates, from the stored records alone:

* **positive cues** — a sampled record's cue made with the noise model (in equal shares: fields
  dropped, a typo, numbers jittered, all three), answered by the full memory;
* **leave-one-out null cues** — the same cues answered by the memory *without* their record
  (the record's pattern is masked out), i.e. fragments of records that are not stored;
* **recombined null cues** — known fields drawn from different records (a cross-check).

For each cue the statistics the verdict uses are measured on the cue itself over its known
units: the field agreement with the memory it lands on (the least agreement over its known
fields) and the cue margin (best − runner-up overall overlap). The thresholds (θ_f, θ_c) are
then picked on a grid to accept as many positive cues as possible while at most ``null_rate``
of each null set and at most ``wrong_rate`` of the accepted positives (cues whose best memory is
not their own record) would be accepted. The whole-cue agreement θ_a keeps its chance-level
default: the field agreement is the sharper test, since a fragment of an unstored record tends
to match its nearest memory on some fields and not at all on another.

With the dense rule the settled state is the best-overlapping memory, so these cue-side
statistics are exactly what :func:`~service.engine.verdict.judge` measures.
"""

from __future__ import annotations

import random
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ._checks import check_float, check_int
from .codec import Codec
from .errors import EmptyMemoryError
from .noise import CUE_KINDS, make_cue, recombined_cue
from .rules import MemoryRule
from .verdict import VerdictThresholds, field_agreement

__all__ = ["CalibrationResult", "calibrate", "cue_statistics"]


@dataclass(frozen=True)
class CalibrationResult:
    """Thresholds chosen by :func:`calibrate` and the rates they give on the calibration cues."""

    thresholds: VerdictThresholds
    n_positive: int
    n_null: int
    positive_accept_rate: float
    wrong_accept_rate: float
    null_accept_rate: float
    recombined_accept_rate: float
    seed: int

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["thresholds"] = self.thresholds.to_dict()
        return out


def cue_statistics(
    patterns: NDArray[np.int8],
    cues: NDArray[np.int8],
    exclude: NDArray[np.int64] | None = None,
    blocks: Sequence[slice] | None = None,
) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Best memory, best overlap, cue margin and field agreement of each cue.

    Overlaps are over each cue's known units; the field agreement is measured against the best
    memory (see :func:`~service.engine.verdict.field_agreement`; equal to the best overlap
    without ``blocks``). ``exclude[i]`` (≥ 0) masks memory ``exclude[i]`` out for cue i
    (leave-one-out).
    """
    xf = patterns.astype(np.float32)
    cf = cues.astype(np.float32)
    n_known = np.maximum(np.count_nonzero(cues, axis=1), 1).astype(np.float32)
    ov = (cf @ xf.T) / n_known[:, None]
    if exclude is not None:
        rows = np.flatnonzero(exclude >= 0)
        ov[rows, exclude[rows]] = -np.inf
    best = np.argmax(ov, axis=1).astype(np.int64)
    top = ov[np.arange(ov.shape[0]), best].astype(np.float64)
    if ov.shape[1] > 1:
        ov[np.arange(ov.shape[0]), best] = -np.inf
        second = ov.max(axis=1).astype(np.float64)
    else:
        second = np.full(ov.shape[0], -1.0)
    second = np.where(np.isfinite(second), second, -1.0)
    if blocks:
        field = field_agreement(xf[best], cf, blocks)
    else:
        field = top
    return best, top, top - second, field


def calibrate(
    rule: MemoryRule,
    codec: Codec,
    records: Sequence[Mapping[str, Any]],
    keys: Sequence[str] | None = None,
    *,
    n_cues: int = 1000,
    null_rate: float = 0.02,
    wrong_rate: float = 0.005,
    seed: int = 0,
) -> CalibrationResult:
    """Choose θ_a (``min_agreement``) and θ_c (``min_cue_margin``) for a collection.

    Parameters
    ----------
    rule : MemoryRule
        The fitted rule (its ``patterns_`` must be the records' patterns, in order).
    codec : Codec
    records : sequence of mappings
        The stored records, in pattern order.
    keys : sequence of str, optional
        Unused by the statistics; accepted so callers can pass what they have.
    n_cues : int
        Positive cues sampled (the null sets have the same size).
    null_rate, wrong_rate : float
        Largest accepted fraction of null cues and of wrong records among accepted positives.
    seed : int
    """
    del keys
    n = check_int(n_cues, "n_cues", low=10, high=100_000)
    check_float(null_rate, "null_rate", low=0.0, high=1.0)
    check_float(wrong_rate, "wrong_rate", low=0.0, high=1.0)
    check_int(seed, "seed", low=0, high=2**63 - 1)
    patterns = rule.patterns_
    n_mem = patterns.shape[0]
    if n_mem < 2 or len(records) != n_mem:
        raise EmptyMemoryError(
            f"calibration needs at least 2 memories and one record per memory; got {n_mem} "
            f"memories and {len(records)} records"
        )
    rng = random.Random(seed)
    picks = [rng.randrange(n_mem) for _ in range(n)]
    # the positives mix every cue kind, so the thresholds serve clean, partial, misspelled and
    # jittered fragments alike rather than only the hardest ones
    pos_cues = [
        make_cue(records[i], codec.schema, CUE_KINDS[j % len(CUE_KINDS)], rng)
        for j, i in enumerate(picks)
    ]
    rec_cues = [recombined_cue(records, codec.schema, rng) for _ in range(n)]
    pos = codec.encode_cues(pos_cues)
    rec = codec.encode_cues(rec_cues)
    own = np.asarray(picks, dtype=np.int64)

    blocks = list(codec.schema.slices.values())
    p_best, _, p_margin, p_top = cue_statistics(patterns, pos, blocks=blocks)
    _, _, l_margin, l_top = cue_statistics(patterns, pos, exclude=own, blocks=blocks)
    _, _, r_margin, r_top = cue_statistics(patterns, rec, blocks=blocks)
    p_ok = p_best == own

    # below, "top" is the field agreement θ_f is compared with
    candidates_a = np.unique(np.concatenate([l_top, r_top, p_top, [-1.0]]))
    candidates_c = np.unique(np.concatenate([l_margin, r_margin, p_margin, [0.0]]))
    # thin the grids; a few hundred points per axis keep this O(grid² · cues) step cheap
    if candidates_a.size > 200:
        candidates_a = np.quantile(candidates_a, np.linspace(0, 1, 200))
    if candidates_c.size > 200:
        candidates_c = np.quantile(candidates_c, np.linspace(0, 1, 200))

    # For each θ_f, the most correct accepts any feasible θ_c gives, and the θ_c that give it.
    rows: list[tuple[int, float, NDArray[np.float64]]] = []
    eps = 1e-9
    tc = candidates_c[:, None]
    # strict '>' on the margin, and margin > 0, so exact ties are never accepted
    p_m = (p_margin[None, :] > tc - eps) & (p_margin[None, :] > 0)
    l_m = (l_margin[None, :] > tc - eps) & (l_margin[None, :] > 0)
    r_m = (r_margin[None, :] > tc - eps) & (r_margin[None, :] > 0)
    for ta in candidates_a:
        acc = p_m & (p_top >= ta - eps)[None, :]  # (n_thresholds_c, n_cues)
        n_acc = acc.sum(axis=1)
        wrong = (acc & ~p_ok[None, :]).sum(axis=1)
        null_acc = (l_m & (l_top >= ta - eps)[None, :]).mean(axis=1)
        rec_acc = (r_m & (r_top >= ta - eps)[None, :]).mean(axis=1)
        feasible = (
            (n_acc > 0)
            & (null_acc <= null_rate)
            & (rec_acc <= null_rate)
            & (wrong <= wrong_rate * n_acc)
        )
        if not feasible.any():
            continue
        good = np.where(feasible, n_acc - wrong, -1)
        top = int(good.max())
        rows.append((top, float(ta), candidates_c[good == top]))
    if not rows:  # nothing separates: accept nothing rather than guess
        theta_a, theta_c = 1.0 + 1e-6, 2.0  # θ_f above any agreement: nothing is recalled
    else:
        # Among the thresholds that accept the most positives, take the middle of the flat
        # region on each axis rather than its edge: no calibration cue lies inside it, so the
        # middle leaves the most room for new cues on both sides (a max-margin choice).
        most = max(r[0] for r in rows)
        tied = [r for r in rows if r[0] == most]
        _, theta_a, tcs = tied[len(tied) // 2]
        theta_c = float(np.sort(tcs)[len(tcs) // 2])
    theta_c = max(theta_c, 1e-6)

    acc = (p_top >= theta_a) & (p_margin >= theta_c)
    n_acc = int(acc.sum())
    return CalibrationResult(
        thresholds=VerdictThresholds(min_field_agreement=theta_a, min_cue_margin=theta_c),
        n_positive=n,
        n_null=n,
        positive_accept_rate=float((acc & p_ok).mean()),
        wrong_accept_rate=float((acc & ~p_ok).sum() / n_acc) if n_acc else 0.0,
        null_accept_rate=float(((l_top >= theta_a) & (l_margin >= theta_c)).mean()),
        recombined_accept_rate=float(((r_top >= theta_a) & (r_margin >= theta_c)).mean()),
        seed=seed,
    )
