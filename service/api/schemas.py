"""Request and response bodies of the HTTP API.

Inputs forbid unknown members, so a misspelled option is a 422 naming it rather than silently
ignored. Whether a field belongs to a collection's schema is the use-cases' call (the schema is
data, not a Python type), so cues and memory fields are open mappings here.
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictFloat, StrictInt, StrictStr

__all__ = [
    "CapacityRead",
    "CollectionCreate",
    "CollectionPage",
    "CollectionRead",
    "CollectionUpdate",
    "CompileRead",
    "DecodedFieldRead",
    "FieldSpec",
    "FieldValue",
    "HealthRead",
    "ImportRead",
    "MemoryCreate",
    "MemoryPage",
    "MemoryPutRead",
    "MemoryRead",
    "NeighbourRead",
    "Problem",
    "ProblemItem",
    "ProblemTypeRead",
    "ReadinessRead",
    "RecallBatchRead",
    "RecallBatchRequest",
    "RecallOptionsSpec",
    "RecallRead",
    "RecallRequest",
    "RecalledMemoryRead",
    "RowErrorRead",
    "SchemaSpec",
    "VerdictOptions",
]

#: A field value as JSON carries it. Strict, so ``true`` or ``[1]`` is a type error and not
#: quietly turned into a number or a string.
FieldValue = StrictStr | StrictInt | StrictFloat | None
Fields = dict[str, FieldValue]
CollectionName = Annotated[
    str,
    Field(
        pattern=r"^[a-z0-9][a-z0-9_-]{0,63}$",
        description="1 to 64 lower-case letters, digits, '-' and '_', starting with a letter or "
        "digit.",
    ),
]
RuleName = Literal["hebbian", "storkey", "projection", "dense"]


class _Input(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _Output(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_by_name=True, validate_by_alias=True)


# ---------------------------------------------------------------------- collections


class FieldSpec(_Input):
    """One field of a schema; which options apply depends on ``kind``."""

    name: str = Field(description="Field name: letters, digits and underscores.")
    kind: Literal["category", "text", "number", "date"]
    units: int | None = Field(default=None, description="Length of the field's block.")
    nullable: bool | None = None
    ngram: int | None = Field(default=None, description="text: character n-gram length.")
    bigrams: bool | None = Field(default=None, description="text: add character bigrams.")
    max_length: int | None = Field(default=None, description="text, category: longest value.")
    tolerance: float | None = Field(
        default=None, description="number: values closer than this encode alike."
    )
    tolerance_days: float | None = Field(default=None, description="date: the same, in days.")
    minimum: StrictFloat | StrictInt | StrictStr | None = Field(
        default=None, description="number or date (YYYY-MM-DD): lowest accepted value."
    )
    maximum: StrictFloat | StrictInt | StrictStr | None = Field(
        default=None, description="number or date (YYYY-MM-DD): highest accepted value."
    )
    clamp: bool | None = Field(
        default=None, description="number, date: clamp out-of-range values instead of refusing."
    )
    tilings: int | None = Field(default=None, description="number, date: tile codings.")


class SchemaSpec(_Input):
    """Ordered fields of a collection."""

    fields: list[FieldSpec] = Field(min_length=1)
    identity_units: int = Field(
        default=0, ge=0, description="Extra units that tell memories with equal fields apart."
    )


class VerdictOptions(_Input):
    """Verdict thresholds and defaults; unset ones are calibrated on the stored memories."""

    calibrate: bool | None = None
    recall_overlap: float | None = None
    min_agreement: float | None = None
    min_cue_margin: float | None = None
    max_steps: int | None = Field(default=None, ge=1)


RuleOptions = dict[str, StrictInt | StrictFloat | bool]


class CollectionCreate(_Input):
    """A new collection: its schema and learning rule."""

    name: CollectionName
    description: str = Field(default="", max_length=2000)
    collection_schema: SchemaSpec = Field(alias="schema")
    rule: RuleName = "dense"
    rule_options: RuleOptions = Field(default_factory=dict)
    verdict_options: VerdictOptions = Field(default_factory=VerdictOptions)
    seed: int | None = Field(
        default=None,
        ge=0,
        lt=2**63,
        description="Seed of the item vectors; chosen at random when left out.",
    )


class CollectionUpdate(_Input):
    """Changes to a collection; members left out stay as they are."""

    description: str | None = Field(default=None, max_length=2000)
    rule: RuleName | None = None
    rule_options: RuleOptions | None = None
    verdict_options: VerdictOptions | None = None


class CollectionRead(_Output):
    name: str
    description: str
    collection_schema: dict[str, Any] = Field(alias="schema")
    rule: str
    rule_options: dict[str, Any]
    verdict_options: dict[str, Any]
    seed: int
    revision: int
    n_memories: int
    n_units: int
    created_at: datetime
    updated_at: datetime


class CollectionPage(_Output):
    items: list[CollectionRead]


# ---------------------------------------------------------------------- memories


class MemoryCreate(_Input):
    """A memory's fields, sent with PUT to create or replace the memory at that key."""

    fields: Fields


class MemoryRead(_Output):
    key: str
    fields: Fields
    created_at: datetime
    updated_at: datetime


class MemoryPutRead(MemoryRead):
    created: bool = Field(description="True when the key was new, false when replaced.")
    revision: int = Field(description="The collection's revision after this write.")


class MemoryPage(_Output):
    items: list[MemoryRead]
    next_cursor: str | None = Field(
        default=None, description="Pass as ?cursor= for the next page; null on the last page."
    )


class RowErrorRead(_Output):
    row: int = Field(description="1-based data row (0 is the CSV header).")
    key: str | None = None
    field: str | None = None
    reason: str


class ImportRead(_Output):
    received: int
    written: int
    created: int
    replaced: int
    skipped: int
    errors: list[RowErrorRead]
    revision: int


# ---------------------------------------------------------------------- recall


class RecallOptionsSpec(_Input):
    """How to settle a cue."""

    mode: Literal["sync", "async"] = "sync"
    clamp: bool = Field(default=False, description="Keep the cued fields fixed while settling.")
    max_steps: int | None = Field(
        default=None, ge=1, description="Step limit; the collection's default when left out."
    )
    top_k: int = Field(default=3, ge=1, le=100, description="How many nearest memories to list.")
    include_energy: bool = Field(default=False, description="Report the energy after each step.")


class RecallRequest(_Input):
    """One cue: whichever fields are known, values possibly misspelled or approximate."""

    cue: Fields
    options: RecallOptionsSpec = Field(default_factory=RecallOptionsSpec)


class RecallBatchRequest(_Input):
    """Several cues settled together; answers come back in the same order."""

    cues: list[Fields] = Field(min_length=1)
    options: RecallOptionsSpec = Field(default_factory=RecallOptionsSpec)


class RecalledMemoryRead(_Output):
    key: str
    fields: Fields


class DecodedFieldRead(_Output):
    value: FieldValue = None
    score: float
    z: float


class NeighbourRead(_Output):
    key: str
    overlap: float


class RecallRead(_Output):
    verdict: Literal["recalled", "spurious", "unsettled"]
    reason: str
    memory: RecalledMemoryRead | None = Field(
        default=None, description="The recalled memory; null otherwise."
    )
    best_key: str = Field(description="The memory nearest the settled state, whatever the verdict.")
    overlap: float = Field(
        description="Overlap of the settled state with its best memory, in [-1, 1]."
    )
    margin: float = Field(description="Best overlap minus the runner-up's, of the settled state.")
    cue_overlap: float = Field(description="Best overlap of the cue itself, over its known units.")
    cue_margin: float = Field(
        description="The cue's lead of its best memory over the runner-up (low: ambiguous)."
    )
    cue_agreement: float = Field(
        description="Agreement of the settled state with the cue over the cue's known units."
    )
    field_agreement: float = Field(
        description="The least agreement with the cue over any one known field (low: far)."
    )
    fields: dict[str, DecodedFieldRead]
    nearest: list[NeighbourRead] = Field(
        description=(
            "The top_k memories nearest the settled state, nearest first; memories with equal "
            "overlap come in the order the compiled collection holds them."
        )
    )
    steps: int
    converged: bool
    cycle_length: int
    revision: int
    energy: list[float] | None = None


class RecallBatchRead(_Output):
    results: list[RecallRead]


# ---------------------------------------------------------------------- compile, capacity


class CompileRead(_Output):
    revision: int
    rule: str
    n_memories: int
    n_units: int
    checksum: str
    duration_ms: float
    thresholds: dict[str, Any]
    capacity: dict[str, Any]
    compiled_at: datetime


class CapacityRead(_Output):
    revision: int
    report: dict[str, Any]


# ---------------------------------------------------------------------- health, problems


class HealthRead(_Output):
    status: Literal["ok"] = "ok"


class ReadinessRead(_Output):
    ready: bool
    database: bool
    migrations_at_head: bool


class ProblemItem(_Output):
    """One failing field (a validation error) or one bad row (an import)."""

    field: str | None = None
    reason: str
    row: int | None = None
    key: str | None = None


class Problem(BaseModel):
    """An RFC 9457 problem document; some types add members of their own."""

    model_config = ConfigDict(extra="allow")

    type: str = Field(description="Stable URI of the problem type; GET it for a description.")
    title: str
    status: int
    detail: str
    instance: str | None = Field(default=None, description="The request path.")
    errors: list[ProblemItem] | None = None


class ProblemTypeRead(_Output):
    type: str
    title: str
    status: int
    description: str


# ---------------------------------------------------------------------- reconciliation

__all__ += ["ReconciliationRead", "ReviewRowRead"]


class ReviewRowRead(_Output):
    """An answered row worth a human look: one of the lowest cue margins of the job."""

    row: int
    ref: str | None = None
    verdict: str
    reason: str
    best_key: str | None = None
    cue_margin: float | None = None
    margin: float | None = None


class ReconciliationRead(_Output):
    """A reconciliation job: its progress, verdict counts so far, and the rows to review."""

    id: str
    collection: str
    state: Literal["queued", "running", "done", "failed", "cancelled"]
    format: Literal["csv", "ndjson"]
    rows_total: int
    rows_done: int
    rate: float | None = Field(default=None, description="Rows answered per second.")
    eta_seconds: float | None = Field(default=None, description="Estimated seconds left.")
    counts: dict[str, int] = Field(
        description="Rows per verdict so far: recalled, spurious, unsettled, invalid."
    )
    reasons: dict[str, dict[str, int]] = Field(
        description="Spurious and unsettled rows per reason."
    )
    error: str | None = Field(default=None, description="Why the job failed.")
    attempts: int = Field(description="How many times a worker took the job up.")
    created_at: datetime
    updated_at: datetime
    started_at: datetime | None = None
    finished_at: datetime | None = None
    review: list[ReviewRowRead] = Field(
        description="Up to 20 answered rows with the lowest cue margins: the closest calls."
    )
    result_url: str = Field(description="Where the per-row results are read.")


# ---------------------------------------------------------------------- keys and audit

__all__ += ["AuditPage", "AuditRead", "KeyCreate", "KeyCreated", "KeyPage", "KeyRead"]

ScopeName = Literal["read", "write", "admin"]


class KeyCreate(_Input):
    """A new key for the caller's team."""

    scopes: list[ScopeName] = Field(
        min_length=1,
        max_length=3,
        description="read: recall, list and read; write: memories and imports; admin: "
        "collections, compile, keys and the audit log.",
    )
    label: str = Field(
        default="",
        max_length=128,
        pattern=r"^[^\x00-\x1f\x7f]*$",
        description="A name to tell keys apart.",
    )
    expires_in_days: int | None = Field(
        default=None, ge=1, le=3650, description="Days until the key stops working; unset: never."
    )


class KeyRead(_Output):
    """A key as listed: never its secret."""

    prefix: str = Field(description="The key's public name, the first 11 characters of it.")
    scopes: list[ScopeName]
    label: str
    state: Literal["active", "revoked", "expired"]
    created_at: datetime
    expires_at: datetime | None = None
    revoked_at: datetime | None = None
    last_used_at: datetime | None = Field(
        default=None, description="Last successful use, to within a minute."
    )


class KeyCreated(KeyRead):
    """A key just created: the only answer that ever carries the secret."""

    secret: str = Field(description="The whole key; send it as 'Authorization: Bearer <key>'.")


class KeyPage(_Output):
    items: list[KeyRead]


class AuditRead(_Output):
    """One write or admin action: who, what, where, when. Never a body or a secret."""

    id: int
    key_prefix: str = Field(description="The key that acted, or 'cli' for the command line.")
    action: str
    collection: str | None = None
    memory_key: str | None = None
    detail: dict[str, Any]
    created_at: datetime


class AuditPage(_Output):
    items: list[AuditRead]
    next_cursor: str | None = Field(description="Pass as cursor for the next (older) page.")
