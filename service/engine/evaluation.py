"""Measure recall quality on records and cue sets, beside an exact nearest-neighbour reference.

For each cue set (one noise kind, or cues of records that are not stored) the report gives:

* ``top1_accuracy`` — the memory nearest the settled state is the cue's own record;
* ``nn_top1_accuracy`` — the same for an exact nearest-neighbour search over the same encoded
  vectors (argmax of the cue's overlap over its known units), the reference to compare with;
* ``recalled_rate``, ``wrong_among_recalled`` — how often the verdict is ``recalled``, and how
  often a recalled record is the wrong one;
* ``abstain_rate`` — ``spurious`` plus ``unsettled``;
* ``false_accept_rate`` — for cues of records not stored, the fraction ``recalled``.

Examples
--------
>>> import numpy as np
>>> from service.engine import DenseRule
>>> from service.engine.codec import Codec, FieldSpec, Schema
>>> schema = Schema((FieldSpec("name", "text"), FieldSpec("site", "category")))
>>> codec = Codec(schema, seed=1)
>>> records = [{"name": f"specimen {c}{d}", "site": f"S{d}"} for c in "abcdefgh" for d in "123"]
>>> rule = DenseRule().fit(codec.encode_records(records))
>>> sets = make_cue_sets(records, schema, kinds=("typo",), n_per_kind=20, seed=0)
>>> report = evaluate(rule, codec, sets)
>>> report[0].kind, report[0].n
('typo', 20)
"""

from __future__ import annotations

import random
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from ._checks import check_int
from .codec import Codec, Schema
from .dynamics import settle
from .errors import ParameterError
from .noise import CUE_KINDS, make_cue
from .rules import MemoryRule
from .verdict import VerdictThresholds, judge

__all__ = ["CueSet", "EvaluationRow", "evaluate", "make_cue_sets", "nearest_neighbour"]


@dataclass(frozen=True)
class CueSet:
    """Cues of one kind; ``truth[i]`` is the pattern index of cue i's record, -1 if not stored."""

    kind: str
    cues: list[dict[str, Any]]
    truth: list[int]


@dataclass(frozen=True)
class EvaluationRow:
    kind: str
    n: int
    top1_accuracy: float
    nn_top1_accuracy: float
    recalled_rate: float
    recalled_correct_rate: float
    wrong_among_recalled: float
    abstain_rate: float
    false_accept_rate: float
    verdicts: dict[str, int]

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def make_cue_sets(
    records: Sequence[Mapping[str, Any]],
    schema: Schema,
    *,
    kinds: Sequence[str] = CUE_KINDS,
    n_per_kind: int = 200,
    seed: int = 0,
    indices: Sequence[int] | None = None,
    truth: Sequence[int] | None = None,
) -> list[CueSet]:
    """One :class:`CueSet` per kind, from records drawn with ``seed``.

    ``indices`` limits the draw to some records; ``truth`` maps each record to its pattern
    index (default: its position; pass -1 for records that are not stored).
    """
    n = check_int(n_per_kind, "n_per_kind", low=1, high=1_000_000)
    for kind in kinds:
        if kind not in CUE_KINDS:
            raise ParameterError(f"kind must be one of {', '.join(CUE_KINDS)}; got {kind!r}")
    pool = list(indices) if indices is not None else list(range(len(records)))
    if not pool:
        raise ParameterError("make_cue_sets needs at least one record")
    rng = random.Random(seed)
    out = []
    for kind in kinds:
        picks = [rng.choice(pool) for _ in range(n)]
        cues = [make_cue(records[i], schema, kind, rng) for i in picks]
        out.append(CueSet(kind, cues, [int(truth[i]) if truth is not None else i for i in picks]))
    return out


def nearest_neighbour(patterns: np.ndarray, cues: np.ndarray) -> np.ndarray:
    """Exact nearest neighbour: the memory with the largest overlap over each cue's known units.

    Equal to the smallest Euclidean distance, since every pattern has the same norm √N.
    """
    scores = cues.astype(np.float32) @ patterns.astype(np.float32).T
    return np.asarray(np.argmax(scores, axis=1), dtype=np.int64)


def evaluate(
    rule: MemoryRule,
    codec: Codec,
    cue_sets: Sequence[CueSet],
    thresholds: VerdictThresholds | None = None,
    *,
    mode: str = "sync",
    max_steps: int = 100,
    batch: int = 256,
) -> list[EvaluationRow]:
    """Recall every cue set with the rule and measure it (see module doc)."""
    size = check_int(batch, "batch", low=1, high=100_000)
    rows = []
    for cs in cue_sets:
        if not cs.cues:
            raise ParameterError(f"cue set {cs.kind!r} is empty")
        encoded = codec.encode_cues(cs.cues)
        truth = np.asarray(cs.truth, dtype=np.int64)
        best = np.empty(len(cs.cues), dtype=np.int64)
        verdicts: list[str] = []
        for start in range(0, len(cs.cues), size):
            part = encoded[start : start + size]
            res = settle(rule, part, mode=mode, max_steps=max_steps)
            blocks = list(codec.schema.slices.values())
            v = judge(rule, part, res, thresholds, top_k=1, blocks=blocks)
            best[start : start + size] = v.best
            verdicts.extend(v.verdict)
        nn = nearest_neighbour(rule.patterns_, encoded)
        recalled = np.array([v == "recalled" for v in verdicts])
        stored = truth >= 0
        correct = best == truth
        n_rec = int(recalled.sum())
        n_stored = int(stored.sum())
        rows.append(
            EvaluationRow(
                kind=cs.kind,
                n=len(cs.cues),
                top1_accuracy=float(correct[stored].mean()) if n_stored else 0.0,
                nn_top1_accuracy=float((nn == truth)[stored].mean()) if n_stored else 0.0,
                recalled_rate=float(recalled.mean()),
                recalled_correct_rate=float((recalled & correct)[stored].mean())
                if n_stored
                else 0.0,
                wrong_among_recalled=float((recalled & ~correct).sum() / n_rec) if n_rec else 0.0,
                abstain_rate=float(1.0 - recalled.mean()),
                false_accept_rate=float(recalled[~stored].mean()) if (~stored).any() else 0.0,
                verdicts={k: verdicts.count(k) for k in ("recalled", "spurious", "unsettled")},
            )
        )
    return rows
