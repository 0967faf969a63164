"""Structured logs: one JSON object per line, one access line per request.

The access line carries the request id (``X-Request-ID``, taken from the caller when it is
short and plain, made up otherwise, and always echoed back), the method, the route *template*
(``/v1/collections/{name}/memories/{key}``, never the raw path, which holds memory keys), the
status, the duration, the client address, and the caller's team and key prefix. It never
carries a header value, a query string, a body or a secret.
"""

from __future__ import annotations

import itertools
import json
import logging
import os
import re
import sys
import time
from datetime import UTC, datetime
from typing import Any, Final

from starlette.datastructures import MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

__all__ = ["ACCESS_LOGGER", "JsonFormatter", "RequestLogMiddleware", "configure_logging"]

ACCESS_LOGGER: Final = "cuebank.access"
REQUEST_ID_HEADER: Final = "X-Request-ID"
_REQUEST_ID_RE: Final = re.compile(r"[A-Za-z0-9._-]{1,64}")
# Attributes every LogRecord has; anything else on a record was passed through ``extra``.
# uvicorn adds ``color_message``, the same text with terminal colour codes: noise in JSON.
_STANDARD: Final = frozenset(vars(logging.makeLogRecord({}))) | {
    "message",
    "asctime",
    "color_message",
}

access_log = logging.getLogger(ACCESS_LOGGER)


class JsonFormatter(logging.Formatter):
    """Formats a record as one JSON object: time, level, logger, message and its extras.

    >>> record = logging.makeLogRecord({"msg": "hi %s", "args": ("there",), "status": 200})
    >>> json.loads(JsonFormatter().format(record))["status"]
    200
    >>> record = logging.makeLogRecord({"msg": "up", "color_message": "\x1b[36mup\x1b[0m"})
    >>> "color_message" in json.loads(JsonFormatter().format(record))
    False
    """

    def format(self, record: logging.LogRecord) -> str:
        doc: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        for key, value in vars(record).items():
            if key not in _STANDARD and not key.startswith("_"):
                doc[key] = value
        if record.exc_info:
            doc["exception"] = self.formatException(record.exc_info)
        return json.dumps(doc, default=str, ensure_ascii=False)


def configure_logging(level: str) -> None:
    """Send the service's and uvicorn's logs to stderr as JSON lines (idempotent)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("cuebank", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        logger.handlers = [handler]
        logger.setLevel(level)
        logger.propagate = False


def _route_template(scope: Scope) -> str | None:
    route = scope.get("route")
    path = getattr(route, "path_format", None) or getattr(route, "path", None)
    return str(path) if path is not None else None


# A random prefix per process and a counter: unique across workers (64 random bits), and no
# system call per request, which uuid4 makes (and which costs a GIL hand-over under load).
_id_prefix = os.urandom(8).hex()
_ID_COUNTER = itertools.count()


def _new_id_prefix() -> None:
    global _id_prefix
    _id_prefix = os.urandom(8).hex()


os.register_at_fork(after_in_child=_new_id_prefix)  # forked workers draw their own


def _new_request_id() -> str:
    """32 hex digits, unique across this service's processes.

    >>> a, b = _new_request_id(), _new_request_id()
    >>> len(a), a != b, a[:16] == b[:16]
    (32, True, True)
    """
    return f"{_id_prefix}{next(_ID_COUNTER) & 0xFFFF_FFFF_FFFF_FFFF:016x}"


class RequestLogMiddleware:
    """Outermost middleware: request id in and out, and one access line per request."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        given = _header(scope, b"x-request-id")
        request_id = given if given and _REQUEST_ID_RE.fullmatch(given) else _new_request_id()
        state = scope.setdefault("state", {})
        state["request_id"] = request_id
        status = 500

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                MutableHeaders(scope=message)[REQUEST_ID_HEADER] = request_id
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            elapsed = time.perf_counter() - started
            route = _route_template(scope)
            metrics = getattr(getattr(scope.get("app"), "state", None), "metrics", None)
            if metrics is not None:
                metrics.observe(scope["method"], route or "(no route)", status, elapsed)
            if access_log.isEnabledFor(logging.INFO):  # the line's fields cost even unlogged
                principal = state.get("principal")
                client = scope.get("client")
                access_log.info(
                    "%s %s %d",
                    scope["method"],
                    route or "(no route)",
                    status,
                    extra={
                        "request_id": request_id,
                        "method": scope["method"],
                        "route": route,
                        "status": status,
                        "duration_ms": round(elapsed * 1000.0, 3),
                        "client": client[0] if client else None,
                        "team": getattr(principal, "team", None),
                        "key_prefix": getattr(principal, "key_prefix", None),
                    },
                )


def _header(scope: Scope, name: bytes) -> str | None:
    for key, value in scope.get("headers", []):
        if key == name:
            try:
                return str(value.decode("latin-1"))
            except UnicodeError:  # pragma: no cover - latin-1 decodes any byte
                return None
    return None
