"""Teams, API keys and the audit log: who may call, with which scopes, and what they changed.

A key looks like ``cb_k3x9q2mf_<43 URL-safe characters>``. The first 11 characters (``cb_`` and
an 8-character id) are the key's *prefix*: not secret, unique, shown in lists, logs and the
audit log, and used to find the key's row. The whole key is secret: 256 random bits follow the
prefix. Only ``HMAC-SHA-256(pepper, key)`` is stored, where the pepper is a server secret kept
outside the database, so a copy of the database alone cannot even be used to test guesses.

Errors raised here::

    ServiceError (service.recall.errors)
    ├── Unauthenticated   401 unauthenticated (no key, malformed, unknown, revoked, expired)
    ├── Forbidden         403 forbidden (the key lacks the scope)
    ├── KeyNotFound       404 key-not-found
    ├── TeamNotFound      404 team-not-found
    └── TeamExists        409 team-exists

>>> prefix, secret = new_secret()
>>> prefix_of(secret) == prefix and len(secret) == 55
True
>>> prefix_of("cb_short") is None
True
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import os
import re
import secrets
import string
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any, Final, Literal

from sqlalchemy.engine import make_url

from service.settings import Settings
from service.storage.db import SessionFactory, unit_of_work
from service.storage.errors import DuplicateNameError
from service.storage.keys import ApiKeyRepository, AuditRepository
from service.storage.models import ApiKey, AuditEvent
from service.storage.repositories import TeamRepository

from .errors import CursorInvalid, LimitExceeded, OptionInvalid, ServiceError
from .paging import decode_cursor, encode_cursor, page_size

__all__ = [
    "AUTH_PROBLEM_TYPES",
    "SCOPES",
    "AuditInfo",
    "AuditPage",
    "Forbidden",
    "KeyInfo",
    "KeyNotFound",
    "KeyService",
    "PepperMissing",
    "Principal",
    "Scope",
    "TeamExists",
    "TeamNotFound",
    "Unauthenticated",
    "hash_secret",
    "load_pepper",
    "new_secret",
    "parse_scopes",
    "prefix_of",
]

Scope = Literal["read", "write", "admin"]
SCOPES: Final[tuple[Scope, ...]] = ("read", "write", "admin")
KEY_TAG: Final = "cb_"
ID_LENGTH: Final = 8
PREFIX_LENGTH: Final = len(KEY_TAG) + ID_LENGTH
_ID_ALPHABET: Final = string.ascii_lowercase + string.digits
# token_urlsafe(32): 32 random bytes, 43 base64url characters without padding.
_SECRET_RE: Final = re.compile(r"cb_[a-z0-9]{8}_[A-Za-z0-9_-]{43}")
TEAM_RE: Final = re.compile(r"^[a-z0-9][a-z0-9_-]{0,63}$")
LABEL_MAX: Final = 128
MAX_EXPIRY_DAYS: Final = 3650
#: A key's last use is written at most this often, so a busy key costs no write per request.
TOUCH_INTERVAL: Final = timedelta(minutes=1)
#: Accepted keys a worker remembers at most (see ``KeyService.recently_accepted``).
MAX_ACCEPTED_CACHED: Final = 10_000
PEPPER_FILE: Final = "key_pepper"
#: The prefix recorded in the audit log for actions taken with the command line.
CLI_ACTOR: Final = "cli"


class Unauthenticated(ServiceError):
    status = 401
    slug = "unauthenticated"
    title = "Authentication required"

    def __init__(self, detail: str, *, invalid: bool) -> None:
        super().__init__(detail)
        # RFC 6750: name the scheme, and say "invalid_token" when a token was sent.
        challenge = 'Bearer realm="cuebank"'
        if invalid:
            challenge += ', error="invalid_token"'
        self.challenge = challenge


class Forbidden(ServiceError):
    status = 403
    slug = "forbidden"
    title = "Scope missing"


class KeyNotFound(ServiceError):
    status = 404
    slug = "key-not-found"
    title = "Key not found"


class TeamNotFound(ServiceError):
    status = 404
    slug = "team-not-found"
    title = "Team not found"


class TeamExists(ServiceError):
    status = 409
    slug = "team-exists"
    title = "Team already exists"


#: The problem types of this module, for /problems/{slug}.
AUTH_PROBLEM_TYPES: Final[dict[str, tuple[str, int]]] = {
    cls.slug: (cls.title, cls.status)
    for cls in (Unauthenticated, Forbidden, KeyNotFound, TeamNotFound, TeamExists)
}


class PepperMissing(RuntimeError):
    """No key pepper is configured where one cannot be generated (a shared database)."""


@dataclass(frozen=True)
class Principal:
    """The authenticated caller: a key of a team, with its scopes."""

    team: str
    team_id: int
    key_prefix: str
    scopes: frozenset[str]

    def allows(self, scope: str) -> bool:
        """Whether the key may act in ``scope``; ``admin`` includes ``read`` and ``write``.

        >>> Principal("t", 1, "cb_x", frozenset({"admin"})).allows("write")
        True
        """
        return scope in self.scopes or "admin" in self.scopes


@dataclass(frozen=True)
class KeyInfo:
    prefix: str
    team: str
    scopes: list[str]
    label: str
    created_at: datetime
    expires_at: datetime | None
    revoked_at: datetime | None
    last_used_at: datetime | None
    state: Literal["active", "revoked", "expired"]


@dataclass(frozen=True)
class AuditInfo:
    id: int
    key_prefix: str
    action: str
    collection: str | None
    memory_key: str | None
    detail: dict[str, Any]
    created_at: datetime


@dataclass(frozen=True)
class AuditPage:
    items: list[AuditInfo]
    next_cursor: str | None


def new_secret() -> tuple[str, str]:
    """A fresh ``(prefix, secret)``; the secret starts with the prefix."""
    ident = "".join(secrets.choice(_ID_ALPHABET) for _ in range(ID_LENGTH))
    prefix = KEY_TAG + ident
    return prefix, f"{prefix}_{secrets.token_urlsafe(32)}"


def prefix_of(secret: str) -> str | None:
    """The prefix of a well-formed secret, None for anything else."""
    if len(secret) > 64 or not _SECRET_RE.fullmatch(secret):
        return None
    return secret[:PREFIX_LENGTH]


def hash_secret(pepper: bytes, secret: str) -> str:
    """The stored form of a secret: hex HMAC-SHA-256 under the server's pepper."""
    return hmac.new(pepper, secret.encode("utf-8"), hashlib.sha256).hexdigest()


def parse_scopes(raw: Iterable[str]) -> list[str]:
    """Scopes in their canonical order, each once; :class:`OptionInvalid` for unknown ones.

    >>> parse_scopes(["admin", "read", "read"])
    ['read', 'admin']
    """
    given = [s.strip() for s in raw if s.strip()]
    unknown = sorted(set(given) - set(SCOPES))
    if unknown:
        raise OptionInvalid(
            f"unknown scope {unknown[0]!r}; scopes are {', '.join(SCOPES)}", field="scopes"
        )
    if not given:
        raise OptionInvalid(f"name at least one scope of {', '.join(SCOPES)}", field="scopes")
    return [s for s in SCOPES if s in given]


def load_pepper(settings: Settings) -> bytes:
    """The key pepper: the setting, or (SQLite only) a file generated once in the data dir.

    With PostgreSQL the workers may run on several machines, and each would generate its own
    file, so the pepper must be configured (``CUEBANK_KEY_PEPPER``).
    """
    if settings.key_pepper is not None:
        return settings.key_pepper.get_secret_value().encode("utf-8")
    if make_url(settings.resolved_database_url).get_backend_name() != "sqlite":
        raise PepperMissing(
            "CUEBANK_KEY_PEPPER is not set; with a shared database every worker needs the same "
            "pepper (at least 32 characters, e.g. from `python -c 'import secrets; "
            "print(secrets.token_hex(32))'`)"
        )
    path = settings.data_dir.expanduser().absolute() / PEPPER_FILE
    path.parent.mkdir(parents=True, exist_ok=True)
    if not path.exists():
        _write_pepper_once(path)
    value = path.read_text(encoding="ascii").strip()
    if len(value) < 32:
        raise PepperMissing(f"{path} holds no usable pepper; delete it only if no key exists")
    return value.encode("ascii")


def _write_pepper_once(path: Path) -> None:
    """Write a new pepper to ``path`` unless another process has: workers starting together
    on a new data directory each try, one wins, and every one reads the winner's whole file.

    The pepper goes to a file of this process's first and is then linked into place, which
    fails if a pepper is already there; creating ``path`` itself and writing it after would
    let another worker read it empty in between (seen with two workers on a new directory).
    """
    draft = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}")
    fd = os.open(draft, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        with os.fdopen(fd, "w", encoding="ascii") as out:
            out.write(secrets.token_hex(32) + "\n")
            out.flush()
            os.fsync(out.fileno())
        with contextlib.suppress(FileExistsError):
            os.link(draft, path)
    finally:
        draft.unlink(missing_ok=True)


def _now() -> datetime:
    return datetime.now(UTC)


def _state(key: ApiKey, now: datetime) -> Literal["active", "revoked", "expired"]:
    if key.revoked_at is not None:
        return "revoked"
    if key.expires_at is not None and key.expires_at <= now:
        return "expired"
    return "active"


def _key_info(key: ApiKey, team: str, now: datetime) -> KeyInfo:
    return KeyInfo(
        prefix=key.prefix,
        team=team,
        scopes=list(key.scopes),
        label=key.label,
        created_at=key.created_at,
        expires_at=key.expires_at,
        revoked_at=key.revoked_at,
        last_used_at=key.last_used_at,
        state=_state(key, now),
    )


def _audit_info(event: AuditEvent) -> AuditInfo:
    return AuditInfo(
        id=event.id,
        key_prefix=event.key_prefix,
        action=event.action,
        collection=event.collection,
        memory_key=event.memory_key,
        detail=dict(event.detail),
        created_at=event.created_at,
    )


def _encode_cursor(event_id: int) -> str:
    return encode_cursor("a1", str(event_id))


def _decode_cursor(cursor: str) -> int:
    position = decode_cursor("a1", cursor)
    if not position.isdigit() or len(position) > 20:
        raise CursorInvalid(
            "the cursor is not one this service issued; start again without one", field="cursor"
        )
    return int(position)


@dataclass
class KeyService:
    """Use-cases of teams, keys and the audit log (one per worker, like RecallService)."""

    settings: Settings
    sessions: SessionFactory
    pepper: bytes
    # The hash compared against when a prefix is unknown, so an unknown key costs the same
    # work as a known one and timing tells nothing about which prefixes exist.
    _decoy: str = field(default="0" * 64, init=False, repr=False)
    # Keys accepted lately, by secret hash: (principal, accepted until). Only successes are
    # kept, so a revocation elsewhere takes effect within ``settings.key_cache_seconds``.
    _accepted: dict[str, tuple[Principal, datetime]] = field(
        default_factory=dict, init=False, repr=False
    )

    # ------------------------------------------------------------------ authentication

    def recently_accepted(self, authorization: str | None) -> Principal | None:
        """The principal if this worker accepted the same key within the cache time, else None.

        No database and no I/O: cheap enough for the event loop. None means "ask
        :meth:`authenticate`", never "refused".
        """
        if not authorization or not self._accepted:
            return None
        scheme, _, token = authorization.strip().partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            return None
        hit = self._accepted.get(hash_secret(self.pepper, token.strip()))
        if hit is None:
            return None
        principal, until = hit
        return principal if _now() < until else None

    def _remember(self, digest: str, principal: Principal, expires_at: datetime | None) -> None:
        ttl = self.settings.key_cache_seconds
        if ttl <= 0:
            return
        now = _now()
        until = now + timedelta(seconds=ttl)
        if expires_at is not None:
            until = min(until, expires_at)
        if len(self._accepted) >= MAX_ACCEPTED_CACHED:
            self._accepted = {d: v for d, v in self._accepted.items() if v[1] > now}
            if len(self._accepted) >= MAX_ACCEPTED_CACHED:
                self._accepted.clear()
        self._accepted[digest] = (principal, until)

    def authenticate(self, authorization: str | None) -> Principal:
        """The principal of an ``Authorization: Bearer <key>`` header value, or raise."""
        if not authorization:
            raise Unauthenticated(
                "this endpoint needs an API key: send 'Authorization: Bearer <key>'",
                invalid=False,
            )
        scheme, _, token = authorization.strip().partition(" ")
        token = token.strip()
        if scheme.lower() != "bearer" or not token:
            raise Unauthenticated("the Authorization header must be 'Bearer <key>'", invalid=True)
        prefix = prefix_of(token)
        invalid = Unauthenticated(
            "the API key is not valid (unknown, revoked or expired)", invalid=True
        )
        if prefix is None:
            raise invalid
        digest = hash_secret(self.pepper, token)
        now = _now()
        with unit_of_work(self.sessions, write=False) as session:
            key = ApiKeyRepository(session).get_by_prefix(prefix)
            stored = key.secret_hash if key is not None else self._decoy
            matches = hmac.compare_digest(digest, stored)
            if key is None or not matches or _state(key, now) != "active":
                raise invalid
            team = TeamRepository(session).get(key.team_id)
            if team is None:  # pragma: no cover - the foreign key cascades
                raise invalid
            principal = Principal(team.name, team.id, key.prefix, frozenset(key.scopes))
            stale = key.last_used_at is None or now - key.last_used_at >= TOUCH_INTERVAL
            key_id = key.id
            self._remember(digest, principal, key.expires_at)
        if stale:
            with unit_of_work(self.sessions, write=True) as session:
                ApiKeyRepository(session).touch(key_id, now)
        return principal

    # ------------------------------------------------------------------ teams

    def create_team(self, name: str) -> str:
        _check_team_name(name)
        with unit_of_work(self.sessions, write=True) as session:
            try:
                TeamRepository(session).create(name)
            except DuplicateNameError:
                raise TeamExists(f"team {name!r} already exists") from None
        return name

    def ensure_team(self, name: str) -> str:
        """The team ``name``, created if missing (the demo's bootstrap)."""
        _check_team_name(name)
        with unit_of_work(self.sessions, write=True) as session:
            repo = TeamRepository(session)
            if repo.get_by_name(name) is None:
                try:
                    repo.create(name)
                except DuplicateNameError:
                    pass  # created concurrently: fine, it exists
        return name

    # ------------------------------------------------------------------ keys

    def create_key(
        self,
        team: str,
        scopes: Iterable[str],
        *,
        label: str = "",
        expires_in_days: int | None = None,
        actor: str = CLI_ACTOR,
    ) -> tuple[KeyInfo, str]:
        """Create a key for ``team``; returns its info and the secret, which is never kept."""
        clean = parse_scopes(scopes)
        if len(label) > LABEL_MAX:
            raise LimitExceeded(
                f"label is {len(label)} characters, above the limit of {LABEL_MAX}",
                limit="label_length",
                value=len(label),
                maximum=LABEL_MAX,
            )
        if any(ord(ch) < 32 or ord(ch) == 127 for ch in label):
            raise OptionInvalid("label contains a control character", field="label")
        now = _now()
        expires_at = None
        if expires_in_days is not None:
            if not 1 <= expires_in_days <= MAX_EXPIRY_DAYS:
                raise OptionInvalid(
                    f"expires_in_days is {expires_in_days}; it must be from 1 to {MAX_EXPIRY_DAYS}",
                    field="expires_in_days",
                )
            expires_at = now + timedelta(days=expires_in_days)
        with unit_of_work(self.sessions, write=True) as session:
            team_row = TeamRepository(session).get_by_name(team)
            if team_row is None:
                raise TeamNotFound(f"there is no team {team!r}; create it first")
            keys = ApiKeyRepository(session)
            for _ in range(5):
                prefix, secret = new_secret()
                try:
                    key = keys.create(
                        team_row.id,
                        prefix=prefix,
                        secret_hash=hash_secret(self.pepper, secret),
                        scopes=clean,
                        label=label,
                        expires_at=expires_at,
                    )
                except DuplicateNameError:
                    continue  # 36^8 ids: a clash is rare; draw again
                break
            else:  # pragma: no cover - five clashes in a row
                raise ServiceError("could not draw an unused key id; try again")
            AuditRepository(session).add(
                team_row.id,
                key_prefix=actor,
                action="key.create",
                detail={"prefix": prefix, "scopes": clean, "label": label},
            )
            return _key_info(key, team, now), secret

    def revoke_key(self, prefix: str, *, team: str | None, actor: str = CLI_ACTOR) -> KeyInfo:
        """Revoke the key ``prefix``; with ``team`` set, only among that team's keys.

        Another team's prefix is reported exactly like an unknown one.
        """
        now = _now()
        with unit_of_work(self.sessions, write=True) as session:
            keys = ApiKeyRepository(session)
            key = keys.get_by_prefix(prefix) if len(prefix) <= PREFIX_LENGTH else None
            owner = TeamRepository(session).get(key.team_id) if key is not None else None
            if key is None or owner is None or (team is not None and owner.name != team):
                raise KeyNotFound(f"there is no key {prefix[:PREFIX_LENGTH]!r}", prefix=None)
            keys.revoke(key, now)
            self._accepted.clear()  # this worker stops accepting it at once
            AuditRepository(session).add(
                owner.id, key_prefix=actor, action="key.revoke", detail={"prefix": key.prefix}
            )
            return _key_info(key, owner.name, now)

    def list_keys(self, team: str) -> list[KeyInfo]:
        now = _now()
        with unit_of_work(self.sessions, write=False) as session:
            team_row = TeamRepository(session).get_by_name(team)
            if team_row is None:
                raise TeamNotFound(f"there is no team {team!r}")
            return [_key_info(k, team, now) for k in ApiKeyRepository(session).list(team_row.id)]

    def replace_labelled_key(
        self, team: str, label: str, scopes: Iterable[str]
    ) -> tuple[KeyInfo, str]:
        """Revoke the team's live keys carrying ``label`` and create a fresh one.

        The demo uses this so every run can print a working key while none is kept in clear.
        """
        for info in self.list_keys(team):
            if info.label == label and info.state == "active":
                self.revoke_key(info.prefix, team=team)
        return self.create_key(team, scopes, label=label)

    # ------------------------------------------------------------------ audit

    def record(
        self,
        principal: Principal,
        action: str,
        *,
        collection: str | None = None,
        memory_key: str | None = None,
        detail: dict[str, Any] | None = None,
    ) -> None:
        """Append one event to the team's audit log (names and counts, never bodies)."""
        with unit_of_work(self.sessions, write=True) as session:
            AuditRepository(session).add(
                principal.team_id,
                key_prefix=principal.key_prefix,
                action=action,
                collection=collection,
                memory_key=memory_key,
                detail=detail,
            )

    def audit_page(self, team_id: int, cursor: str | None, limit: int | None) -> AuditPage:
        size = page_size(self.settings, limit)
        before = _decode_cursor(cursor) if cursor else None
        with unit_of_work(self.sessions, write=False) as session:
            rows = AuditRepository(session).page(team_id, before, size)
        more = len(rows) > size
        items = [_audit_info(e) for e in rows[:size]]
        return AuditPage(items, _encode_cursor(items[-1].id) if more and items else None)


def _check_team_name(name: str) -> None:
    if not TEAM_RE.match(name):
        raise OptionInvalid(
            f"team name {name[:70]!r} must be 1 to 64 characters: lower-case letters, digits, "
            "'-' and '_', starting with a letter or digit",
            field="team",
        )
