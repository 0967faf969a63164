"""Queries for API keys and the audit log.

Like :mod:`service.storage.repositories`, these flush but never commit. Nothing here sees a
secret: keys arrive already hashed, and the audit log holds names, never bodies.
"""

from __future__ import annotations

import builtins
from datetime import datetime
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.storage.errors import DuplicateNameError
from service.storage.models import ApiKey, AuditEvent

__all__ = ["ApiKeyRepository", "AuditRepository"]


class ApiKeyRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def create(
        self,
        team_id: int,
        *,
        prefix: str,
        secret_hash: str,
        scopes: list[str],
        label: str,
        expires_at: datetime | None,
    ) -> ApiKey:
        """Insert a key; :class:`DuplicateNameError` if the prefix is taken."""
        key = ApiKey(
            team_id=team_id,
            prefix=prefix,
            secret_hash=secret_hash,
            scopes=list(scopes),
            label=label,
            expires_at=expires_at,
        )
        try:
            with self.session.begin_nested():
                self.session.add(key)
        except IntegrityError as exc:
            raise DuplicateNameError("key", prefix) from exc
        return key

    def get_by_prefix(self, prefix: str) -> ApiKey | None:
        return self.session.scalars(select(ApiKey).where(ApiKey.prefix == prefix)).one_or_none()

    def list(self, team_id: int) -> builtins.list[ApiKey]:
        """The team's keys, oldest first, revoked and expired ones included."""
        stmt = select(ApiKey).where(ApiKey.team_id == team_id).order_by(ApiKey.id)
        return builtins.list(self.session.scalars(stmt))

    def revoke(self, key: ApiKey, when: datetime) -> None:
        if key.revoked_at is None:
            key.revoked_at = when
            self.session.flush()

    def touch(self, key_id: int, when: datetime) -> None:
        """Record a use without loading the row (one UPDATE, no read)."""
        self.session.execute(update(ApiKey).where(ApiKey.id == key_id).values(last_used_at=when))


class AuditRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def add(
        self,
        team_id: int,
        *,
        key_prefix: str,
        action: str,
        collection: str | None = None,
        memory_key: str | None = None,
        detail: dict[str, Any] | None = None,
    ) -> AuditEvent:
        event = AuditEvent(
            team_id=team_id,
            key_prefix=key_prefix,
            action=action,
            collection=collection,
            memory_key=memory_key,
            detail=dict(detail or {}),
        )
        self.session.add(event)
        self.session.flush()
        return event

    def page(self, team_id: int, before_id: int | None, size: int) -> builtins.list[AuditEvent]:
        """Up to ``size`` + 1 events, newest first, older than ``before_id`` when given.

        The extra row tells the caller whether another page follows without a COUNT.
        """
        stmt = select(AuditEvent).where(AuditEvent.team_id == team_id)
        if before_id is not None:
            stmt = stmt.where(AuditEvent.id < before_id)
        stmt = stmt.order_by(AuditEvent.id.desc()).limit(size + 1)
        return builtins.list(self.session.scalars(stmt))
