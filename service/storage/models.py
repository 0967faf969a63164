"""Database tables as SQLAlchemy typed declarative models.

Only generic column types are used so one set of models (and one chain of migrations) serves
SQLite and PostgreSQL. Every schema change goes through a migration in ``migrations/``;
``tests/test_migrations.py`` fails when the two drift apart.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    CheckConstraint,
    DateTime,
    Dialect,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

__all__ = [
    "NAMING_CONVENTION",
    "ApiKey",
    "AuditEvent",
    "Base",
    "Collection",
    "CompileReport",
    "Memory",
    "ReconciliationJob",
    "ReconciliationRow",
    "Team",
    "UTCDateTime",
    "utcnow",
]

# Deterministic constraint names: migrations can address constraints by name on every
# database, and SQLite batch rebuilds keep them.
NAMING_CONVENTION: dict[str, str] = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

TEAM_NAME_LENGTH = 64
COLLECTION_NAME_LENGTH = 128
MEMORY_KEY_LENGTH = 256
RULE_LENGTH = 32
CHECKSUM_LENGTH = 64


def utcnow() -> datetime:
    """The current time as a timezone-aware UTC datetime."""
    return datetime.now(UTC)


class UTCDateTime(TypeDecorator[datetime]):
    """A timestamp stored in UTC and always read back timezone-aware.

    SQLite has no timezone-aware type and hands back naive values; normalising here keeps
    every layer above free of the difference between the two databases.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"timestamp {value.isoformat()} has no timezone; use UTC")
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value.astimezone(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class Team(Base):
    __tablename__ = "teams"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(TEAM_NAME_LENGTH), unique=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)

    def __repr__(self) -> str:
        return f"Team(id={self.id!r}, name={self.name!r})"


class Collection(Base):
    __tablename__ = "collections"
    __table_args__ = (
        UniqueConstraint("team_id", "name"),
        CheckConstraint("revision >= 0", name="revision_not_negative"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    team_id: Mapped[int] = mapped_column(ForeignKey("teams.id", ondelete="CASCADE"))
    name: Mapped[str] = mapped_column(String(COLLECTION_NAME_LENGTH))
    description: Mapped[str] = mapped_column(Text, default="", server_default="")
    # Ordered field definitions, each {"name", "kind", "dims", ...}.
    schema: Mapped[dict[str, Any]] = mapped_column(JSON)
    rule: Mapped[str] = mapped_column(String(RULE_LENGTH))
    rule_options: Mapped[dict[str, Any]] = mapped_column(JSON)
    verdict_options: Mapped[dict[str, Any]] = mapped_column(JSON)
    seed: Mapped[int] = mapped_column(BigInteger)
    # Bumped in SQL by every change to the memories; compiled weights are tagged with it.
    revision: Mapped[int] = mapped_column(BigInteger, default=0, server_default="0")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow, onupdate=utcnow)

    def __repr__(self) -> str:
        return (
            f"Collection(id={self.id!r}, team_id={self.team_id!r}, name={self.name!r}, "
            f"revision={self.revision!r})"
        )


class Memory(Base):
    __tablename__ = "memories"
    # The unique constraint's index (collection_id, key) also serves the keyset pages, the
    # ordered full scans and the foreign key, so no separate index is needed.
    __table_args__ = (UniqueConstraint("collection_id", "key"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    collection_id: Mapped[int] = mapped_column(ForeignKey("collections.id", ondelete="CASCADE"))
    key: Mapped[str] = mapped_column(String(MEMORY_KEY_LENGTH))
    fields: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow, onupdate=utcnow)

    def __repr__(self) -> str:
        return f"Memory(collection_id={self.collection_id!r}, key={self.key!r})"


class CompileReport(Base):
    __tablename__ = "compile_reports"
    __table_args__ = (Index(None, "collection_id", "id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    collection_id: Mapped[int] = mapped_column(ForeignKey("collections.id", ondelete="CASCADE"))
    revision: Mapped[int] = mapped_column(BigInteger)
    rule: Mapped[str] = mapped_column(String(RULE_LENGTH))
    n_memories: Mapped[int] = mapped_column(Integer)
    n_units: Mapped[int] = mapped_column(Integer)
    weights_checksum: Mapped[str] = mapped_column(String(CHECKSUM_LENGTH))
    report: Mapped[dict[str, Any]] = mapped_column(JSON)
    duration_ms: Mapped[float] = mapped_column(Float)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)

    def __repr__(self) -> str:
        return (
            f"CompileReport(id={self.id!r}, collection_id={self.collection_id!r}, "
            f"revision={self.revision!r})"
        )


JOB_STATE_LENGTH = 16
JOB_FORMAT_LENGTH = 16
JOB_ID_LENGTH = 36
JOB_OWNER_LENGTH = 128


class ReconciliationJob(Base):
    """A file of fragments recalled in the background, batch by batch.

    ``rows_done`` and the result rows of a batch are committed together, so after any crash the
    job resumes exactly where its last committed batch ended. ``owner`` names the worker thread
    holding a running job (host, process id and a per-runner token); ``updated_at`` is its
    heartbeat.
    """

    __tablename__ = "reconciliation_jobs"
    __table_args__ = (Index(None, "state", "created_at"),)

    id: Mapped[str] = mapped_column(String(JOB_ID_LENGTH), primary_key=True)
    team_id: Mapped[int] = mapped_column(ForeignKey("teams.id", ondelete="CASCADE"))
    collection_id: Mapped[int] = mapped_column(ForeignKey("collections.id", ondelete="CASCADE"))
    state: Mapped[str] = mapped_column(String(JOB_STATE_LENGTH))
    format: Mapped[str] = mapped_column(String(JOB_FORMAT_LENGTH))
    input: Mapped[bytes] = mapped_column(LargeBinary)
    rows_total: Mapped[int] = mapped_column(Integer)
    rows_done: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    counts: Mapped[dict[str, Any]] = mapped_column(JSON)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)
    owner: Mapped[str | None] = mapped_column(String(JOB_OWNER_LENGTH), nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    finished_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)

    def __repr__(self) -> str:
        return f"ReconciliationJob(id={self.id!r}, state={self.state!r})"


class ReconciliationRow(Base):
    """One answered fragment of a job; ``row`` is its 1-based position in the input."""

    __tablename__ = "reconciliation_rows"

    job_id: Mapped[str] = mapped_column(
        ForeignKey("reconciliation_jobs.id", ondelete="CASCADE"), primary_key=True
    )
    row: Mapped[int] = mapped_column(Integer, primary_key=True)
    verdict: Mapped[str] = mapped_column(String(JOB_STATE_LENGTH))
    # Kept as a column so the job summary can pick the closest calls without reading every row.
    cue_margin: Mapped[float | None] = mapped_column(Float, nullable=True)
    data: Mapped[dict[str, Any]] = mapped_column(JSON)


KEY_PREFIX_LENGTH = 16
KEY_HASH_LENGTH = 64
KEY_LABEL_LENGTH = 128
AUDIT_ACTION_LENGTH = 64


class ApiKey(Base):
    """A team's API key: only the HMAC of the secret is kept, the prefix names and finds it."""

    __tablename__ = "api_keys"
    __table_args__ = (Index(None, "team_id", "id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    team_id: Mapped[int] = mapped_column(ForeignKey("teams.id", ondelete="CASCADE"))
    prefix: Mapped[str] = mapped_column(String(KEY_PREFIX_LENGTH), unique=True)
    secret_hash: Mapped[str] = mapped_column(String(KEY_HASH_LENGTH))
    scopes: Mapped[list[str]] = mapped_column(JSON)
    label: Mapped[str] = mapped_column(String(KEY_LABEL_LENGTH), default="", server_default="")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)
    expires_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    last_used_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)

    def __repr__(self) -> str:
        # Never the hash: reprs end up in logs and tracebacks.
        return f"ApiKey(id={self.id!r}, team_id={self.team_id!r}, prefix={self.prefix!r})"


class AuditEvent(Base):
    """One write or admin action: who (team, key prefix), what, on which collection and key."""

    __tablename__ = "audit_events"
    __table_args__ = (Index(None, "team_id", "id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    team_id: Mapped[int] = mapped_column(ForeignKey("teams.id", ondelete="CASCADE"))
    key_prefix: Mapped[str] = mapped_column(String(KEY_PREFIX_LENGTH))
    action: Mapped[str] = mapped_column(String(AUDIT_ACTION_LENGTH))
    collection: Mapped[str | None] = mapped_column(String(COLLECTION_NAME_LENGTH), nullable=True)
    memory_key: Mapped[str | None] = mapped_column(String(MEMORY_KEY_LENGTH), nullable=True)
    detail: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), default=utcnow)

    def __repr__(self) -> str:
        return f"AuditEvent(id={self.id!r}, team_id={self.team_id!r}, action={self.action!r})"
