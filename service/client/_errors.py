"""Typed errors built from the service's problem documents (RFC 9457).

::

    CuebankError                 any failed call; carries type, status, title, detail, extra
    ├── ConnectionFailed         no answer: refused, timed out, DNS (status 0)
    ├── InvalidInput             400, 405, 415, 422 (malformed body, invalid field, option...)
    ├── Unauthorized             401 (no key, unknown or revoked key)
    ├── Forbidden                403 (the key lacks the scope)
    ├── NotFound                 404 (collection, memory, job, path)
    ├── Conflict                 409 (name taken, collection empty, job finished...)
    ├── LimitExceeded            413, or any limit-exceeded problem
    ├── RateLimited              429 (``retry_after`` in seconds when the service says)
    ├── Unavailable              503 (database unreachable or not migrated)
    └── ServerError              any other 5xx
"""

from __future__ import annotations

import json
from typing import Any

import httpx

__all__ = [
    "Conflict",
    "ConnectionFailed",
    "CuebankError",
    "Forbidden",
    "InvalidInput",
    "LimitExceeded",
    "NotFound",
    "RateLimited",
    "ServerError",
    "Unauthorized",
    "Unavailable",
    "error_from_response",
]

_STANDARD = ("type", "title", "status", "detail")


class CuebankError(Exception):
    """A call the service refused or could not answer."""

    def __init__(
        self,
        *,
        type: str,
        status: int,
        title: str,
        detail: str,
        extra: dict[str, Any] | None = None,
    ) -> None:
        super().__init__(f"{status} {title}: {detail}" if status else detail)
        self.type = type
        self.status = status
        self.title = title
        self.detail = detail
        self.extra: dict[str, Any] = dict(extra or {})

    @property
    def slug(self) -> str:
        """The last part of ``type``: ``collection-not-found``."""
        return self.type.rsplit("/", 1)[-1]


class ConnectionFailed(CuebankError):
    pass


class InvalidInput(CuebankError):
    pass


class Unauthorized(CuebankError):
    pass


class Forbidden(CuebankError):
    pass


class NotFound(CuebankError):
    pass


class Conflict(CuebankError):
    pass


class LimitExceeded(CuebankError):
    pass


class RateLimited(CuebankError):
    @property
    def retry_after(self) -> float | None:
        value = self.extra.get("retry_after")
        return float(value) if isinstance(value, int | float) else None


class Unavailable(CuebankError):
    pass


class ServerError(CuebankError):
    pass


_BY_STATUS: dict[int, type[CuebankError]] = {
    400: InvalidInput,
    401: Unauthorized,
    403: Forbidden,
    404: NotFound,
    405: InvalidInput,
    409: Conflict,
    413: LimitExceeded,
    415: InvalidInput,
    422: InvalidInput,
    429: RateLimited,
    503: Unavailable,
}


def error_from_response(response: httpx.Response) -> CuebankError:
    """The typed error for a failed response; a body that is no problem document still works.

    >>> r = httpx.Response(404, json={"type": "/problems/collection-not-found",
    ...     "title": "Collection not found", "status": 404, "detail": "no 'x'", "collection": "x"})
    >>> err = error_from_response(r)
    >>> type(err).__name__, err.slug, err.extra
    ('NotFound', 'collection-not-found', {'collection': 'x'})
    """
    status = response.status_code
    try:
        body = response.json()
    except (json.JSONDecodeError, UnicodeDecodeError):
        body = None
    if not isinstance(body, dict):
        body = {}
    extra = {k: v for k, v in body.items() if k not in _STANDARD}
    if "retry-after" in response.headers and "retry_after" not in extra:
        try:
            extra["retry_after"] = float(response.headers["retry-after"])
        except ValueError:
            pass
    problem_type = str(body.get("type") or "about:blank")
    if problem_type.endswith("/limit-exceeded"):
        cls: type[CuebankError] = LimitExceeded
    else:
        cls = _BY_STATUS.get(status, ServerError if status >= 500 else InvalidInput)
    return cls(
        type=problem_type,
        status=int(body.get("status") or status),
        title=str(body.get("title") or response.reason_phrase or "Error"),
        detail=str(body.get("detail") or response.text[:500] or "no detail given"),
        extra=extra,
    )
