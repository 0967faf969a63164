"""The FastAPI application: ``create_app(settings)`` builds it, the lifespan wires it.

Nothing connects at import time. On startup the lifespan checks the database is at the newest
migration (or applies them, when asked to), then builds the engine, the session factory and the
one :class:`RecallService` every request shares; on shutdown it disposes of the engine.
"""

from __future__ import annotations

import logging
import re
import threading
from collections.abc import AsyncIterator, Callable, Sequence
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from sqlalchemy.engine import make_url
from starlette.concurrency import run_in_threadpool

from service.recall.auth import KeyService, PepperMissing, load_pepper
from service.recall.errors import ServiceError
from service.recall.jobs import JobRunner, ReconciliationService
from service.recall.models import RecallResult
from service.recall.service import RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import current_revision, head_revision, upgrade_to_head

from . import docs
from .batching import RecallQueue
from .bodies import BodyLimitMiddleware
from .direct import DirectRecallMiddleware
from .engine_threads import EngineThreads
from .errors import PROBLEM_MEDIA_TYPE, UnexpectedErrorMiddleware, install_error_handlers
from .heap import HeapFreezer
from .lifecycle import Lifecycle
from .logs import RequestLogMiddleware
from .metrics import Metrics
from .metrics import router as metrics_router
from .routers import collections, health, keys, memories, problems, recall, reconciliations
from .routers.recall import (
    SHARED_BATCH_CUES,
    RecallKey,
    answer_bytes,
    count_verdicts,
    shared_batches,
)
from .security import AuthMiddleware, FailureLimiter, TokenBuckets, document_security

__all__ = ["DatabaseNotReady", "create_app"]

DESCRIPTION = (
    "Content-addressable lookup over partial keys. Store a collection's records as memories; "
    "send a cue made of whatever fields you know and get back the full record, its overlap "
    "and a verdict: `recalled`, `spurious` or `unsettled`. The verdict is a statistical signal, "
    "not proof: records about people need human review before any decision is taken on them. "
    "Errors are RFC 9457 problem documents; each `type` URI is described at /problems/{slug}. "
    "Every call except the probes, these docs and the problem pages needs a team's API key as "
    "`Authorization: Bearer <key>`; each operation names the scope it needs (`read`, `write` "
    "or `admin`)."
)


class DatabaseNotReady(RuntimeError):
    """The database is unreachable or behind the newest migration; the service will not start."""


def _safe_url(url: str) -> str:
    return make_url(url).render_as_string(hide_password=True)


def _check_database(url: str, migrate: bool) -> None:
    if migrate:
        upgrade_to_head(url)
        return
    try:
        current = current_revision(url)
    except Exception as exc:
        raise DatabaseNotReady(f"cannot reach the database at {_safe_url(url)}: {exc}") from exc
    head = head_revision()
    if current != head:
        raise DatabaseNotReady(
            f"the database at {_safe_url(url)} is at migration {current or 'none (empty)'}, "
            f"not at the newest one, {head}; run `cuebank migrate` first"
        )


def _warm(service: RecallService) -> None:
    try:
        count = service.warm()
    except Exception:  # a warm-up failure must never take the worker down; recall compiles
        logging.getLogger("cuebank").warning(
            "warming the compiled-memory cache failed", exc_info=True
        )
        return
    logging.getLogger("cuebank").info("compiled %d collections at start", count)


def _lifespan(settings: Settings, migrate: bool) -> Callable[[FastAPI], Any]:
    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        url = settings.resolved_database_url
        await run_in_threadpool(_check_database, url, migrate)
        try:
            pepper = await run_in_threadpool(load_pepper, settings)
        except (PepperMissing, OSError) as exc:
            raise DatabaseNotReady(f"cannot check API keys: {exc}") from exc
        engine = make_engine(url, sqlite_synchronous=settings.sqlite_synchronous)
        try:
            app.state.engine = engine
            app.state.service = service = RecallService(settings, make_session_factory(engine))
            # Recalls are numpy work holding the GIL between products: threads beyond the
            # worker's share of cores only contend, so they take turns (see engine_threads).
            app.state.engine_threads = threads = EngineThreads(settings.engine_threads)
            app.state.heap = heap = HeapFreezer(lambda: service.cache.generation)

            def run(key: RecallKey, cues: Sequence[Any]) -> list[bytes | ServiceError]:
                # answers written here, beside the results: the event loop has requests to read
                answers = service.recall_each(key[0], key[1], cues, key[2])
                heap.after_run()
                results = [a for a in answers if isinstance(a, RecallResult)]
                count_verdicts(app.state.metrics, results)
                return [a if isinstance(a, ServiceError) else answer_bytes(a) for a in answers]

            app.state.recall_queue = RecallQueue[RecallKey, bytes](
                run, max_batch=settings.recall_batch_max, threads=threads
            )
            app.state.batch_queue = RecallQueue[RecallKey, bytes](
                shared_batches(service, heap, app.state),
                max_batch=SHARED_BATCH_CUES,
                threads=threads,
                size=len,
            )
            app.state.keys = KeyService(settings, make_session_factory(engine), pepper)
            app.state.jobs = ReconciliationService(app.state.service)
            # One job runner per app; it resumes jobs a previous process left running.
            runner = JobRunner(app.state.jobs)
            await run_in_threadpool(runner.start)
            if settings.warm_on_start:
                # in the background: readiness must not wait for a large compile
                threading.Thread(
                    target=_warm, args=(app.state.service,), name="cuebank-warm", daemon=True
                ).start()
            app.state.lifecycle = lifecycle = Lifecycle(settings.shutdown_drain_seconds)
            lifecycle.install()
            try:
                yield
            finally:
                lifecycle.shut_down()
                await run_in_threadpool(runner.stop)
                await run_in_threadpool(threads.close)
        finally:
            engine.dispose()

    return lifespan


def _problem_media_types(schema: dict[str, Any]) -> dict[str, Any]:
    """File every error response's content under application/problem+json."""
    for item in schema.get("paths", {}).values():
        for op in item.values():
            if not isinstance(op, dict):
                continue
            for status, response in op.get("responses", {}).items():
                content = response.get("content")
                if status[:1] not in ("4", "5") or not content or "application/json" not in content:
                    continue
                moved = content.pop("application/json")
                content.setdefault(PROBLEM_MEDIA_TYPE, {}).update(moved)
    return schema


def create_app(settings: Settings, *, migrate: bool = False, direct_recall: bool = True) -> FastAPI:
    """Build the application for ``settings``.

    ``migrate=True`` applies pending migrations at startup (the demo and the tests); without it
    the app refuses to start on a database that is not at the newest migration.
    ``direct_recall=False`` sends single-cue recalls through the framework's route too (the
    tests compare the two paths; see :mod:`service.api.direct`).
    """
    app = FastAPI(
        # Cuebank exports Prometheus metrics at /metrics and JSON access logs; the framework's
        # own OpenTelemetry hooks looked up the global providers on every request.
        telemetry={"tracing": False, "metrics": False, "logs": False, "operation_spans": False},
        title="Cuebank",
        version="0.1.0",
        description=DESCRIPTION,
        lifespan=_lifespan(settings, migrate),
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.metrics = Metrics(app)
    install_error_handlers(app)
    app.include_router(collections.router)
    app.include_router(memories.router)
    app.include_router(recall.router)
    app.include_router(reconciliations.router)
    app.include_router(keys.router)
    app.include_router(health.router)
    app.include_router(metrics_router)
    app.include_router(problems.router)
    app.include_router(docs.router)
    # Innermost: ordinary single-cue recalls are answered here, after the body checks and the
    # authentication, without the framework's routing.
    app.add_middleware(DirectRecallMiddleware, enabled=direct_recall)
    # A body is capped before any route reads it; the last middleware added is the outermost,
    # so the catch-all for unexpected errors wraps the body limit too.
    app.add_middleware(
        BodyLimitMiddleware,
        max_body=settings.max_body_bytes,
        max_bulk_body=settings.max_bulk_body_bytes,
        bulk_path=re.compile(
            f"{memories.IMPORT_PATH.pattern}|{reconciliations.SUBMIT_PATH.pattern}"
        ),
        max_json_depth=settings.max_json_depth,
    )
    # Outside the body limit: a caller without a valid key is refused before its body is read.
    app.add_middleware(
        AuthMiddleware,
        buckets=TokenBuckets(settings.rate_per_second, settings.burst),
        failures=FailureLimiter(settings.auth_failures_per_minute),
    )
    app.add_middleware(UnexpectedErrorMiddleware)
    # Outermost, so every answer (a 500 too) carries the request id and gets its log line.
    app.add_middleware(RequestLogMiddleware)

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = get_openapi(
                title=app.title,
                version=app.version,
                description=app.description,
                routes=app.routes,
            )
            app.openapi_schema = document_security(_problem_media_types(schema), app.routes)
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
    return app
