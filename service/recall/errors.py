"""Service errors: what the use-cases raise, each with its HTTP status and stable problem type.

The API layer turns every one of these into an RFC 9457 ``application/problem+json`` document
(``type`` = :attr:`ServiceError.type_uri`, ``title``, ``status``, ``detail``, plus the extra
members in :attr:`ServiceError.extra`). Engine errors never reach the API: the use-cases map them
here.

::

    ServiceError                       500 internal
    ├── NotFoundError                  404
    │   ├── CollectionNotFound             collection-not-found
    │   ├── MemoryNotFound                 memory-not-found
    │   └── JobNotFound                    job-not-found
    ├── ConflictError                  409
    │   ├── CollectionExists               collection-exists
    │   ├── EmptyCollection                collection-empty (recall or compile with no memories)
    │   ├── DependentMemories              memories-dependent
    │   └── JobFinished                    job-finished (cancelling a job that has ended)
    ├── InvalidInputError              422 invalid-input
    │   ├── SchemaInvalid                  invalid-schema
    │   ├── RecordInvalid                  invalid-record
    │   ├── CueInvalid                     invalid-cue
    │   ├── OptionInvalid                  invalid-option
    │   ├── CursorInvalid                  invalid-cursor
    │   ├── ImportRejected                 import-rejected (one entry per bad row)
    │   └── FragmentsRejected              fragments-rejected (a reconciliation file's header)
    ├── LimitExceeded                  413 or 422 limit-exceeded (names the limit and the value)
    └── Unavailable                    503 unavailable (database unreachable, not migrated)
"""

from __future__ import annotations

from typing import Any, ClassVar

__all__ = [
    "CollectionExists",
    "CollectionNotFound",
    "ConflictError",
    "CueInvalid",
    "CursorInvalid",
    "DependentMemories",
    "EmptyCollection",
    "FragmentsRejected",
    "ImportRejected",
    "InvalidInputError",
    "JobFinished",
    "JobNotFound",
    "LimitExceeded",
    "MemoryNotFound",
    "NotFoundError",
    "OptionInvalid",
    "RecordInvalid",
    "SchemaInvalid",
    "ServiceError",
    "Unavailable",
    "problem_type_uri",
]

PROBLEM_BASE = "/problems/"


def problem_type_uri(slug: str) -> str:
    """The problem ``type`` for a slug: a path the service answers with a description."""
    return PROBLEM_BASE + slug


class ServiceError(Exception):
    """Base of every error a use-case raises on purpose."""

    status: ClassVar[int] = 500
    slug: ClassVar[str] = "internal"
    title: ClassVar[str] = "Internal error"

    def __init__(self, detail: str, **extra: Any) -> None:
        super().__init__(detail)
        self.detail = detail
        self.extra: dict[str, Any] = {k: v for k, v in extra.items() if v is not None}

    @property
    def type_uri(self) -> str:
        return problem_type_uri(self.slug)

    @property
    def http_status(self) -> int:
        return self.status


class NotFoundError(ServiceError):
    status = 404
    slug = "not-found"
    title = "Not found"


class CollectionNotFound(NotFoundError):
    slug = "collection-not-found"
    title = "Collection not found"


class MemoryNotFound(NotFoundError):
    slug = "memory-not-found"
    title = "Memory not found"


class ConflictError(ServiceError):
    status = 409
    slug = "conflict"
    title = "Conflict"


class CollectionExists(ConflictError):
    slug = "collection-exists"
    title = "Collection already exists"


class EmptyCollection(ConflictError):
    slug = "collection-empty"
    title = "Collection is empty"


class DependentMemories(ConflictError):
    slug = "memories-dependent"
    title = "Memories are linearly dependent"


class InvalidInputError(ServiceError):
    status = 422
    slug = "invalid-input"
    title = "Invalid input"


class SchemaInvalid(InvalidInputError):
    slug = "invalid-schema"
    title = "Invalid schema"


class RecordInvalid(InvalidInputError):
    slug = "invalid-record"
    title = "Invalid record"


class CueInvalid(InvalidInputError):
    slug = "invalid-cue"
    title = "Invalid cue"


class OptionInvalid(InvalidInputError):
    slug = "invalid-option"
    title = "Invalid option"


class CursorInvalid(InvalidInputError):
    slug = "invalid-cursor"
    title = "Invalid cursor"


class ImportRejected(InvalidInputError):
    slug = "import-rejected"
    title = "Import rejected"


class JobNotFound(NotFoundError):
    slug = "job-not-found"
    title = "Reconciliation job not found"


class JobFinished(ConflictError):
    slug = "job-finished"
    title = "Reconciliation job already finished"


class FragmentsRejected(InvalidInputError):
    slug = "fragments-rejected"
    title = "Fragments file rejected"


class LimitExceeded(ServiceError):
    """A hard limit was exceeded; ``extra`` carries ``limit``, ``value`` and ``maximum``."""

    status = 422
    slug = "limit-exceeded"
    title = "Limit exceeded"

    def __init__(
        self, detail: str, *, limit: str, value: Any, maximum: Any, status: int = 422
    ) -> None:
        super().__init__(detail, limit=limit, value=value, maximum=maximum)
        self._status = status

    @property
    def http_status(self) -> int:
        return self._status


class Unavailable(ServiceError):
    status = 503
    slug = "unavailable"
    title = "Service unavailable"


#: Every concrete problem slug with its title and status, for the docs and /problems/{slug}.
PROBLEM_TYPES: dict[str, tuple[str, int]] = {
    cls.slug: (cls.title, cls.status)
    for cls in (
        ServiceError,
        NotFoundError,
        CollectionNotFound,
        MemoryNotFound,
        ConflictError,
        CollectionExists,
        EmptyCollection,
        DependentMemories,
        InvalidInputError,
        SchemaInvalid,
        RecordInvalid,
        CueInvalid,
        OptionInvalid,
        CursorInvalid,
        ImportRejected,
        LimitExceeded,
        Unavailable,
        JobNotFound,
        JobFinished,
        FragmentsRejected,
    )
}
