"""Every error the API answers with, as RFC 9457 ``application/problem+json``.

Service errors carry their own status and type. This module adds the problems only HTTP can
cause (a body that is not JSON or not UTF-8, an unknown route, a wrong method or media type) and
turns request-validation errors into one problem that lists each failing field. Anything else
is a bug: it is logged with its traceback and answered with a bare 500 that shows no internals.

::

    ServiceError (service.recall.errors)
    ├── MalformedJson            400 malformed-json
    ├── MalformedBody            400 malformed-body (not UTF-8, unreadable)
    ├── RouteNotFound            404 not-found (no such path)
    ├── MethodNotAllowed         405 method-not-allowed
    ├── UnsupportedMediaType     415 unsupported-media-type
    ├── RequestInvalid           422 invalid-request (fields failing validation, listed)
    └── RateLimited              429 rate-limited (Retry-After says when to come back)

Authentication and scope problems (401, 403) come from :mod:`service.recall.auth`.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from http import HTTPStatus
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy import exc as sa_exc
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import Match
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.recall.auth import AUTH_PROBLEM_TYPES, Unauthenticated
from service.recall.errors import PROBLEM_TYPES, ServiceError, Unavailable, problem_type_uri

__all__ = [
    "API_PROBLEM_TYPES",
    "PROBLEM_MEDIA_TYPE",
    "MalformedBody",
    "MalformedJson",
    "MethodNotAllowed",
    "RateLimited",
    "RequestInvalid",
    "RouteNotFound",
    "UnexpectedErrorMiddleware",
    "UnsupportedMediaType",
    "all_problem_types",
    "field_path",
    "install_error_handlers",
    "problem_body",
    "problem_response",
]

PROBLEM_MEDIA_TYPE = "application/problem+json"
logger = logging.getLogger("cuebank.api")


class MalformedJson(ServiceError):
    status = 400
    slug = "malformed-json"
    title = "Malformed JSON"


class MalformedBody(ServiceError):
    status = 400
    slug = "malformed-body"
    title = "Malformed request body"


class RouteNotFound(ServiceError):
    status = 404
    slug = "not-found"
    title = "Not found"


class MethodNotAllowed(ServiceError):
    status = 405
    slug = "method-not-allowed"
    title = "Method not allowed"


class UnsupportedMediaType(ServiceError):
    status = 415
    slug = "unsupported-media-type"
    title = "Unsupported media type"


class RequestInvalid(ServiceError):
    status = 422
    slug = "invalid-request"
    title = "Invalid request"


class RateLimited(ServiceError):
    status = 429
    slug = "rate-limited"
    title = "Too many requests"

    def __init__(self, detail: str, *, retry_after: int, limit: str) -> None:
        super().__init__(detail, limit=limit, retry_after=retry_after)
        self.retry_after = retry_after


#: Problem types only the HTTP layer raises, beside the service's own.
API_PROBLEM_TYPES: dict[str, tuple[str, int]] = {
    cls.slug: (cls.title, cls.status)
    for cls in (
        MalformedJson,
        MalformedBody,
        RouteNotFound,
        MethodNotAllowed,
        UnsupportedMediaType,
        RequestInvalid,
        RateLimited,
    )
}


def all_problem_types() -> dict[str, tuple[str, int]]:
    """Every problem slug the API can answer with, and its title and usual status."""
    return {**PROBLEM_TYPES, **AUTH_PROBLEM_TYPES, **API_PROBLEM_TYPES}


def problem_body(
    *, slug: str, title: str, status: int, detail: str, instance: str | None, **extra: Any
) -> dict[str, Any]:
    body: dict[str, Any] = {
        "type": problem_type_uri(slug),
        "title": title,
        "status": status,
        "detail": detail,
    }
    if instance is not None:
        body["instance"] = instance
    # The standard members win: an extra called "status" must not change the answer's meaning.
    body.update({k: v for k, v in extra.items() if k not in body and v is not None})
    return body


def problem_response(
    error: ServiceError, instance: str | None, headers: Mapping[str, str] | None = None
) -> JSONResponse:
    body = problem_body(
        slug=error.slug,
        title=error.title,
        status=error.http_status,
        detail=error.detail,
        instance=instance,
        **error.extra,
    )
    return JSONResponse(
        body, status_code=error.http_status, media_type=PROBLEM_MEDIA_TYPE, headers=headers
    )


def field_path(loc: Sequence[str | int]) -> str:
    """A validation error's location as the caller wrote it: ``cues[2].taxon``.

    >>> field_path(("body", "cues", 2, "taxon"))
    'cues[2].taxon'
    >>> field_path(("query", "limit"))
    'limit'
    """
    parts = list(loc)
    if parts and parts[0] in ("body", "query", "path", "header", "cookie"):
        parts = parts[1:]
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out or "body"


def _validation_problem(exc: RequestValidationError) -> ServiceError:
    errors = list(exc.errors())
    for err in errors:
        if err.get("type") == "json_invalid":
            reason = (err.get("ctx") or {}).get("error", "invalid JSON")
            position = err["loc"][1] if len(err["loc"]) > 1 else None
            where = f" at character {position}" if isinstance(position, int) else ""
            return MalformedJson(f"the request body is not valid JSON: {reason}{where}")
    items = []
    for err in errors:
        name = field_path(err.get("loc", ()))
        message = str(err.get("msg", "invalid"))
        if err.get("type") == "missing":
            message = "this field is required"
        elif err.get("type") == "extra_forbidden":
            message = "there is no such field"
        items.append({"field": name, "reason": message})
    first = items[0] if items else {"field": "body", "reason": "invalid"}
    more = f" (and {len(items) - 1} more)" if len(items) > 1 else ""
    return RequestInvalid(f"field '{first['field']}': {first['reason']}{more}", errors=items)


async def _on_service_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, ServiceError)
    if isinstance(exc, Unauthenticated):
        return problem_response(exc, request.url.path, {"WWW-Authenticate": exc.challenge})
    if isinstance(exc, RateLimited):
        return problem_response(exc, request.url.path, {"Retry-After": str(exc.retry_after)})
    return problem_response(exc, request.url.path)


async def _on_validation_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    return problem_response(_validation_problem(exc), request.url.path)


async def _on_http_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    status = exc.status_code
    error: ServiceError
    if status == 404:
        error = RouteNotFound(f"there is no resource at {request.url.path}")
    elif status == 405:
        # Starlette names the methods of the first route on the path only; a path served by
        # several routes (GET and POST /v1/collections) deserves the whole list.
        allowed = ", ".join(_allowed_methods(request)) or (exc.headers or {}).get("allow", "")
        headers = {**(exc.headers or {}), "allow": allowed} if allowed else exc.headers
        error = MethodNotAllowed(
            f"{request.method} is not allowed on {request.url.path}"
            + (f"; allowed: {allowed}" if allowed else "")
        )
        return problem_response(error, request.url.path, headers=headers)
    elif status == 400:
        error = MalformedBody(f"the request body could not be read: {exc.detail}")
    else:
        # A status the framework raises that has no type of its own: RFC 9457's about:blank,
        # whose title is the HTTP phrase.
        phrase = HTTPStatus(status).phrase if status in set(HTTPStatus) else "Error"
        body: dict[str, Any] = {
            "type": "about:blank",
            "title": phrase,
            "status": status,
            "detail": str(exc.detail),
            "instance": request.url.path,
        }
        return JSONResponse(
            body, status_code=status, media_type=PROBLEM_MEDIA_TYPE, headers=exc.headers
        )
    return problem_response(error, request.url.path, headers=exc.headers)


def _allowed_methods(request: Request) -> list[str]:
    # Ask the router, method by method: included routers hide their routes' method sets.
    allowed = []
    for method in ("GET", "POST", "PUT", "PATCH", "DELETE"):
        scope = {**request.scope, "method": method}
        if any(route.matches(scope)[0] == Match.FULL for route in request.app.routes):
            allowed.append(method)
    return allowed


def install_error_handlers(app: FastAPI) -> None:
    app.add_exception_handler(ServiceError, _on_service_error)
    app.add_exception_handler(RequestValidationError, _on_validation_error)
    app.add_exception_handler(StarletteHTTPException, _on_http_error)
    app.add_exception_handler(sa_exc.DBAPIError, _on_database_error)
    app.add_exception_handler(sa_exc.TimeoutError, _on_database_error)


#: Seconds a client is asked to wait after a 503 caused by the database.
DATABASE_RETRY_AFTER = 1


def database_unavailable(exc: BaseException) -> Unavailable | None:
    """The 503 for a database the service cannot reach or use right now; None for other errors.

    A lost or refused connection, a server going away mid-query, a SQLite file locked past the
    busy timeout and a connection pool with none free all pass once the database is back, so
    the client is told to retry rather than that the service is broken.
    """
    if isinstance(exc, sa_exc.TimeoutError):
        return Unavailable("every database connection is in use; retry shortly", database=True)
    if isinstance(exc, sa_exc.DBAPIError) and (
        exc.connection_invalidated
        or isinstance(exc, sa_exc.OperationalError | sa_exc.InterfaceError)
    ):
        return Unavailable("the database cannot be reached now; retry shortly", database=False)
    return None


def _database_problem(exc: BaseException, method: str, path: str) -> JSONResponse:
    problem = database_unavailable(exc)
    if problem is None:
        logger.error("unexpected database error answering %s %s", method, path, exc_info=exc)
        return internal_problem(path)
    # The driver's message can name hosts and users, so it goes to the log only.
    logger.warning("database unavailable answering %s %s: %s", method, path, exc)
    return problem_response(problem, path, {"Retry-After": str(DATABASE_RETRY_AFTER)})


async def _on_database_error(request: Request, exc: Exception) -> JSONResponse:
    return _database_problem(exc, request.method, request.url.path)


def internal_problem(instance: str | None) -> JSONResponse:
    error = ServiceError("the service met an unexpected error; it has been logged")
    return problem_response(error, instance)


class UnexpectedErrorMiddleware:
    """Answers any exception no handler took with a 500 problem, after logging it.

    Starlette's own last-resort handler would re-raise after answering; here the traceback goes
    to the log once and the client gets a problem document without internals.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracking_send(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, tracking_send)
        except Exception as exc:
            # Middlewares outside the exception handlers (authentication) query the database too.
            if not started and database_unavailable(exc) is not None:
                response = _database_problem(exc, scope["method"], scope["path"])
                await response(scope, receive, send)
                return
            logger.exception("unexpected error answering %s %s", scope["method"], scope["path"])
            if started:
                raise
            response = internal_problem(scope.get("path"))
            await response(scope, receive, send)
