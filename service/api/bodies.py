"""Request-body limits and decoding, before any router sees the body.

Single requests are read whole here, up to ``max_body_bytes``, so an oversized body becomes a
413 problem naming the limit instead of an endless read. Bulk imports stream past this
middleware and are read in chunks by their route against ``max_bulk_body_bytes``.
"""

from __future__ import annotations

import re
from collections.abc import AsyncIterator

from starlette.datastructures import Headers
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.recall.errors import LimitExceeded, ServiceError

from .errors import MalformedBody, problem_response

__all__ = ["BodyLimitMiddleware", "body_too_large", "check_utf8", "read_capped"]


def body_too_large(size: int, maximum: int, limit: str) -> LimitExceeded:
    return LimitExceeded(
        f"the request body is more than {maximum} bytes, the limit ({limit})",
        limit=limit,
        value=size,
        maximum=maximum,
        status=413,
    )


def check_utf8(body: bytes) -> None:
    """Raise a 400 problem naming the first bad byte unless ``body`` is UTF-8."""
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise MalformedBody(
            f"the request body is not UTF-8: byte 0x{body[exc.start]:02x} at offset {exc.start}"
        ) from None


def _declared_length(headers: Headers) -> int | None:
    raw = headers.get("content-length")
    if raw is None or not raw.isdigit():
        return None
    return int(raw)


async def read_capped(chunks: AsyncIterator[bytes], maximum: int, limit: str) -> bytes:
    """Read a streamed body, stopping as soon as it passes ``maximum`` bytes."""
    parts: list[bytes] = []
    size = 0
    async for chunk in chunks:
        size += len(chunk)
        if size > maximum:
            raise body_too_large(size, maximum, limit)
        parts.append(chunk)
    return b"".join(parts)


def _is_json(headers: Headers) -> bool:
    media = headers.get("content-type", "").split(";", 1)[0].strip().lower()
    return media == "application/json" or media.endswith("+json") or media == ""


class BodyLimitMiddleware:
    """Caps every request body; buffers single requests and checks JSON bodies are UTF-8.

    ``bulk_path`` matches the paths whose route streams the body itself (bulk imports): for
    those only the declared Content-Length is checked here, against the bulk limit.
    """

    def __init__(
        self, app: ASGIApp, *, max_body: int, max_bulk_body: int, bulk_path: re.Pattern[str]
    ) -> None:
        self.app = app
        self.max_body = max_body
        self.max_bulk_body = max_bulk_body
        self.bulk_path = bulk_path

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        declared = _declared_length(headers)
        path: str = scope["path"]
        if self.bulk_path.fullmatch(path):
            if declared is not None and declared > self.max_bulk_body:
                error = body_too_large(declared, self.max_bulk_body, "max_bulk_body_bytes")
                await problem_response(error, path)(scope, receive, send)
                return
            await self.app(scope, receive, send)
            return
        try:
            if declared is not None and declared > self.max_body:
                raise body_too_large(declared, self.max_body, "max_body_bytes")
            body, trailing = await self._read(receive)
            if body and _is_json(headers):
                check_utf8(body)
        except ServiceError as error:
            await problem_response(error, path)(scope, receive, send)
            return

        replayed = False

        async def replay() -> Message:
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": body, "more_body": False}
            if trailing is not None:
                return trailing
            return await receive()

        await self.app(scope, replay, send)

    async def _read(self, receive: Receive) -> tuple[bytes, Message | None]:
        parts: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return b"".join(parts), message
            chunk: bytes = message.get("body", b"")
            size += len(chunk)
            if size > self.max_body:
                raise body_too_large(size, self.max_body, "max_body_bytes")
            parts.append(chunk)
            if not message.get("more_body", False):
                return b"".join(parts), None
