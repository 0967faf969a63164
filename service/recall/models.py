"""Plain data passed between the HTTP layer and the use-cases (no numpy, no ORM objects).

Field values travel as JSON-ready Python values: ``str`` for category and text fields, ``float``
(or ``int``) for numbers, ISO ``YYYY-MM-DD`` strings for dates, ``None`` for a missing value.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Literal

FieldValue = str | int | float | None
Fields = dict[str, FieldValue]


@dataclass(frozen=True)
class CollectionSpec:
    """What a caller sends to create a collection."""

    name: str
    schema: dict[str, Any]
    rule: str = "dense"
    rule_options: dict[str, Any] = field(default_factory=dict)
    verdict_options: dict[str, Any] = field(default_factory=dict)
    description: str = ""
    seed: int | None = None


@dataclass(frozen=True)
class CollectionPatch:
    """Changes to a collection; None leaves a member as it is. A new rule bumps the revision."""

    description: str | None = None
    rule: str | None = None
    rule_options: dict[str, Any] | None = None
    verdict_options: dict[str, Any] | None = None


@dataclass(frozen=True)
class CollectionInfo:
    name: str
    description: str
    schema: dict[str, Any]
    rule: str
    rule_options: dict[str, Any]
    verdict_options: dict[str, Any]
    seed: int
    revision: int
    n_memories: int
    n_units: int
    created_at: datetime
    updated_at: datetime


@dataclass(frozen=True)
class MemoryInfo:
    key: str
    fields: Fields
    created_at: datetime
    updated_at: datetime


@dataclass(frozen=True)
class PutResult:
    memory: MemoryInfo
    created: bool
    revision: int


@dataclass(frozen=True)
class MemoryPage:
    items: list[MemoryInfo]
    next_cursor: str | None


@dataclass(frozen=True)
class RowError:
    """One bad row of a bulk import: 1-based row number (data rows, header excluded)."""

    row: int
    key: str | None
    field: str | None
    reason: str


@dataclass(frozen=True)
class ImportReport:
    received: int
    written: int
    created: int
    replaced: int
    skipped: int
    errors: list[RowError]
    revision: int


@dataclass(frozen=True)
class RecallOptions:
    mode: Literal["sync", "async"] = "sync"
    clamp: bool = False
    max_steps: int | None = None  # None: the collection's default (settings.default_steps)
    top_k: int = 3
    include_energy: bool = False


@dataclass(frozen=True)
class DecodedField:
    """The field value nearest the settled state's block, its overlap and z-score (√d·m)."""

    value: FieldValue
    score: float
    z: float


@dataclass(frozen=True)
class Neighbour:
    key: str
    overlap: float


@dataclass(frozen=True)
class RecalledMemory:
    """The stored record a cue was recalled to."""

    key: str
    fields: Fields


@dataclass(frozen=True)
class RecallResult:
    verdict: Literal["recalled", "spurious", "unsettled"]
    reason: str
    memory: RecalledMemory | None  # the retrieved memory, only when recalled
    best_key: str  # the memory nearest the settled state, whatever the verdict
    overlap: float
    margin: float
    cue_overlap: float
    cue_margin: float
    cue_agreement: float
    field_agreement: float
    fields: dict[str, DecodedField]
    nearest: list[Neighbour]
    steps: int
    converged: bool
    cycle_length: int
    revision: int
    energy: list[float] | None = None


@dataclass(frozen=True)
class CompileInfo:
    revision: int
    rule: str
    n_memories: int
    n_units: int
    checksum: str
    duration_ms: float
    thresholds: dict[str, Any]
    capacity: dict[str, Any]
    compiled_at: datetime


@dataclass(frozen=True)
class CapacityInfo:
    revision: int
    report: dict[str, Any]


@dataclass(frozen=True)
class Readiness:
    ready: bool
    database: bool
    migrations_at_head: bool
    detail: str = ""
