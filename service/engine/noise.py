"""Cue makers: the noise a fragment suffers on its way to the service, made reproducibly.

Used to calibrate verdict thresholds on a collection's own records and to evaluate recall
quality. Every function draws from an explicit :class:`random.Random`, so a seed fixes the cues.

Cue kinds:

* ``drop`` — some fields are unknown (at least one stays known);
* ``typo`` — one text field has one edit (substitution, deletion, insertion or transposition);
* ``jitter`` — numbers and dates moved by up to half their tolerance;
* ``mixed`` — fields dropped, then a typo and a jitter where they apply.

Examples
--------
>>> import random
>>> from service.engine.codec import FieldSpec, Schema
>>> schema = Schema((FieldSpec("taxon", "text"), FieldSpec("depth_m", "number", tolerance=2.0)))
>>> cue = make_cue({"taxon": "Nassa reticulata", "depth_m": 12.0}, schema, "typo",
...                random.Random(4))
>>> cue["taxon"] != "Nassa reticulata", cue["depth_m"]
(True, 12.0)
"""

from __future__ import annotations

import datetime
import random
import string
from collections.abc import Mapping, Sequence
from typing import Any

from .codec import Schema
from .errors import ParameterError

__all__ = ["CUE_KINDS", "make_cue", "recombined_cue", "typo"]

CUE_KINDS: tuple[str, ...] = ("drop", "typo", "jitter", "mixed")
_LETTERS = string.ascii_lowercase


def typo(text: str, rng: random.Random) -> str:
    """One random edit of ``text``: substitute, delete, insert or transpose one character.

    >>> typo("Littorina", random.Random(0)) != "Littorina"
    True
    """
    if len(text) < 2:
        return text + rng.choice(_LETTERS)
    op = rng.choice(("substitute", "delete", "insert", "transpose"))
    i = rng.randrange(len(text))
    if op == "substitute":
        repl = rng.choice([c for c in _LETTERS if c != text[i].lower()])
        return text[:i] + repl + text[i + 1 :]
    if op == "delete":
        return text[:i] + text[i + 1 :]
    if op == "insert":
        return text[:i] + rng.choice(_LETTERS) + text[i:]
    j = min(i + 1, len(text) - 1) if i + 1 < len(text) else i - 1
    a, b = sorted((i, j))
    swapped = text[:a] + text[b] + text[a] + text[b + 1 :]
    return swapped if swapped != text else typo(text, rng)


def _jitter(value: Any, kind: str, tolerance: float, rng: random.Random) -> Any:
    if value is None:
        return None
    shift = rng.uniform(-0.5, 0.5) * tolerance
    if kind == "number":
        return float(value) + shift
    day = value if isinstance(value, datetime.date) else datetime.date.fromisoformat(str(value))
    return (day + datetime.timedelta(days=round(shift))).isoformat()


def make_cue(
    record: Mapping[str, Any],
    schema: Schema,
    kind: str,
    rng: random.Random,
    *,
    keep: int | None = None,
) -> dict[str, Any]:
    """A cue made from a stored record by one noise ``kind`` (see module doc).

    ``keep`` fixes how many fields stay known for ``drop`` and ``mixed`` (default: a random
    count from half the fields, rounded up, to all but one).
    """
    if kind not in CUE_KINDS:
        raise ParameterError(f"kind must be one of {', '.join(CUE_KINDS)}; got {kind!r}")
    names = [f.name for f in schema.fields]
    cue: dict[str, Any] = {n: record.get(n) for n in names}
    if kind in ("drop", "mixed") and len(names) > 1:
        lo = (len(names) + 1) // 2
        k = keep if keep is not None else rng.randint(lo, len(names) - 1)
        k = max(1, min(k, len(names)))
        kept = set(rng.sample(names, k))
        cue = {n: v for n, v in cue.items() if n in kept}
    if kind in ("typo", "mixed"):
        texts = [
            f.name
            for f in schema.fields
            if f.kind == "text" and isinstance(cue.get(f.name), str) and cue[f.name]
        ]
        if texts:
            name = rng.choice(texts)
            cue[name] = typo(str(cue[name]), rng)
    if kind in ("jitter", "mixed"):
        for f in schema.fields:
            if f.name not in cue or f.kind not in ("number", "date"):
                continue
            tol = float(f.tolerance or 1.0) if f.kind == "number" else float(f.tolerance_days)
            moved = _jitter(cue[f.name], f.kind, tol, rng)
            if f.kind == "number" and moved is not None:
                lo_b = f.minimum if isinstance(f.minimum, int | float) else None
                hi_b = f.maximum if isinstance(f.maximum, int | float) else None
                if lo_b is not None:
                    moved = max(float(lo_b), moved)
                if hi_b is not None:
                    moved = min(float(hi_b), moved)
            cue[f.name] = moved
    return cue


def recombined_cue(
    records: Sequence[Mapping[str, Any]],
    schema: Schema,
    rng: random.Random,
    *,
    n_fields: int | None = None,
) -> dict[str, Any]:
    """A cue whose known fields come from different random records (it fits no record)."""
    names = [f.name for f in schema.fields]
    k = n_fields if n_fields is not None else max(2, (len(names) + 1) // 2)
    k = max(1, min(k, len(names)))
    chosen = rng.sample(names, k)
    donors = rng.sample(range(len(records)), min(k, len(records)))
    return {name: records[donors[i % len(donors)]].get(name) for i, name in enumerate(chosen)}
