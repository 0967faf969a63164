"""Authentication at the door: every non-public request names a valid key before anything else.

The check runs as ASGI middleware, outside the body limit, so a caller without a valid key is
turned away before one byte of its body is read and before any route or validation runs. What
a key may *do* (its scopes) is each route's own declaration (``RequireScope`` in
:mod:`service.api.deps`); this module only decides *who* is calling, and how fast they may.

Two in-memory limiters guard the door, per worker process (several workers multiply the
allowance; that is the price of needing no shared store):

* a token bucket per key (``rate_per_second``, ``burst``) → 429 with Retry-After;
* failed authentications per client address: after ``auth_failures_per_minute`` in a minute,
  every request from that address that carries an Authorization header is refused with 429
  until the minute is over, so guessing keys costs a minute per handful of guesses and the
  database sees none of them.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from http import HTTPStatus
from typing import Any, Final

from fastapi.routing import APIRoute, iter_route_contexts
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import Headers
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Receive, Scope, Send

from service.recall.auth import KeyService, Principal, Unauthenticated

from .deps import route_scope
from .errors import PROBLEM_MEDIA_TYPE, RateLimited, problem_response
from .examples import openapi_examples

__all__ = [
    "PUBLIC_PATHS",
    "PUBLIC_PREFIXES",
    "AuthMiddleware",
    "FailureLimiter",
    "TokenBuckets",
    "document_security",
    "is_public",
    "protected_routes",
]

SECURITY_SCHEME: Final = "bearerAuth"

#: Paths anyone may call: probes, the API description and the problem-type pages.
PUBLIC_PATHS: Final = frozenset({"/healthz", "/readyz", "/metrics", "/docs", "/openapi.json"})
PUBLIC_PREFIXES: Final = ("/docs/", "/problems/")
#: Addresses (failure windows) or keys (buckets) remembered at most, so a flood of new ones
#: cannot grow a worker's memory without bound.
MAX_TRACKED: Final = 50_000


def is_public(path: str) -> bool:
    """Whether ``path`` is served without a key.

    >>> is_public("/healthz"), is_public("/problems/forbidden"), is_public("/v1/keys")
    (True, True, False)
    """
    return path in PUBLIC_PATHS or path.startswith(PUBLIC_PREFIXES)


@dataclass
class TokenBuckets:
    """One token bucket per key: ``rate`` tokens a second, at most ``burst`` saved up."""

    rate: float
    burst: int
    clock: Callable[[], float] = time.monotonic
    _buckets: dict[str, tuple[float, float]] = field(default_factory=dict)

    def take(self, name: str) -> float:
        """Spend a token of ``name``'s bucket; return 0, or the seconds until one is there."""
        now = self.clock()
        tokens, last = self._buckets.get(name, (float(self.burst), now))
        tokens = min(float(self.burst), tokens + (now - last) * self.rate)
        if tokens < 1.0:
            self._buckets[name] = (tokens, now)
            return (1.0 - tokens) / self.rate
        if len(self._buckets) >= MAX_TRACKED and name not in self._buckets:
            # Full buckets carry no information: forgetting them changes no answer.
            horizon = self.burst / self.rate
            self._buckets = {k: v for k, v in self._buckets.items() if now - v[1] < horizon}
        self._buckets[name] = (tokens - 1.0, now)
        return 0.0


@dataclass
class FailureLimiter:
    """Counts failed authentications per client address in fixed one-minute windows."""

    per_minute: int
    clock: Callable[[], float] = time.monotonic
    window: float = 60.0
    _counts: dict[str, tuple[float, int]] = field(default_factory=dict)

    def blocked_for(self, address: str) -> float:
        """Seconds until ``address`` may try again; 0 when it may now."""
        start, count = self._counts.get(address, (0.0, 0))
        remaining = start + self.window - self.clock()
        if remaining <= 0 or count < self.per_minute:
            return 0.0
        return remaining

    def failed(self, address: str) -> None:
        now = self.clock()
        start, count = self._counts.get(address, (now, 0))
        if now - start >= self.window:
            start, count = now, 0
        if len(self._counts) >= MAX_TRACKED and address not in self._counts:
            self._counts = {k: v for k, v in self._counts.items() if now - v[0] < self.window}
        self._counts[address] = (start, count + 1)


def _retry_after(seconds: float) -> int:
    return max(1, math.ceil(seconds))


class AuthMiddleware:
    """Authenticates non-public requests and applies the two limiters.

    The principal is left in ``scope["state"]["principal"]`` for the routes (and the request
    log); the key service is looked up on the app at call time, as the lifespan builds it.
    """

    def __init__(
        self,
        app: ASGIApp,
        *,
        buckets: TokenBuckets,
        failures: FailureLimiter,
    ) -> None:
        self.app = app
        self.buckets = buckets
        self.failures = failures

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or is_public(scope["path"]):
            await self.app(scope, receive, send)
            return
        path: str = scope["path"]
        try:
            principal = await self._authenticate(scope)
        except Unauthenticated as error:
            headers = {"WWW-Authenticate": error.challenge}
            await problem_response(error, path, headers=headers)(scope, receive, send)
            return
        except RateLimited as error:
            headers = {"Retry-After": str(error.retry_after)}
            await problem_response(error, path, headers=headers)(scope, receive, send)
            return
        scope.setdefault("state", {})["principal"] = principal
        await self.app(scope, receive, send)

    async def _authenticate(self, scope: Scope) -> Principal:
        headers = Headers(scope=scope)
        authorization = headers.get("authorization")
        client = scope.get("client")
        address = str(client[0]) if client else "unknown"
        if authorization is not None:
            wait = self.failures.blocked_for(address)
            if wait > 0:
                raise RateLimited(
                    f"too many failed authentications from this address; try again in "
                    f"{_retry_after(wait)} s",
                    retry_after=_retry_after(wait),
                    limit="auth_failures_per_minute",
                )
        keys: KeyService = scope["app"].state.keys
        try:
            cached = keys.recently_accepted(authorization)
            principal = (
                cached
                if cached is not None
                else await run_in_threadpool(keys.authenticate, authorization)
            )
        except Unauthenticated:
            if authorization is not None:
                self.failures.failed(address)
            raise
        wait = self.buckets.take(principal.key_prefix)
        if wait > 0:
            raise RateLimited(
                f"key {principal.key_prefix} is over its rate of {self.buckets.rate:g} "
                f"requests a second (burst {self.buckets.burst}); try again in "
                f"{_retry_after(wait)} s",
                retry_after=_retry_after(wait),
                limit="rate_per_second",
            )
        return principal


def protected_routes(routes: list[BaseRoute]) -> list[tuple[str, frozenset[str], str | None]]:
    """``(path, methods, scope)`` of every API route that needs a key, as the app serves it."""
    out = []
    for context in iter_route_contexts(routes):
        route, path = context.original_route, context.path_format
        if not isinstance(route, APIRoute) or path is None or is_public(path):
            continue
        out.append((path, frozenset(context.methods or ()), route_scope(route)))
    return out


def document_security(schema: dict[str, Any], routes: list[BaseRoute]) -> dict[str, Any]:
    """Add the bearer scheme to the OpenAPI document, and to each protected operation its
    security requirement, its scope and the 401, 403 and 429 answers the door can give."""
    components = schema.setdefault("components", {})
    components.setdefault("securitySchemes", {})[SECURITY_SCHEME] = {
        "type": "http",
        "scheme": "bearer",
        "description": "An API key, 'cb_' and 52 more characters, as 'Authorization: Bearer "
        "<key>'. Create the first with `cuebank key create`; admins create more at /v1/keys.",
    }
    stored = openapi_examples("Problem")
    for path, methods, scope in protected_routes(routes):
        for method in methods:
            op = schema.get("paths", {}).get(path, {}).get(method.lower())
            if op is None:
                continue
            op["security"] = [{SECURITY_SCHEME: []}]
            if scope is not None:
                op["x-scope"] = scope
                note = f"Needs a key with the `{scope}` scope."
                op["description"] = (
                    f"{op['description']}\n\n{note}" if op.get("description") else note
                )
            answers = [("401", "unauthenticated"), ("429", "rate-limited")]
            if scope is not None:
                answers.append(("403", "forbidden"))
            for status, name in answers:
                response = op.setdefault("responses", {}).setdefault(
                    status, {"description": HTTPStatus(int(status)).phrase}
                )
                content = response.setdefault("content", {}).setdefault(
                    PROBLEM_MEDIA_TYPE, {"schema": {"$ref": "#/components/schemas/Problem"}}
                )
                content.setdefault("examples", {})[name] = stored[name]
    return schema
