"""Liveness and readiness probes for process supervisors and load balancers."""

from __future__ import annotations

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool

from service.api.deps import SettingsDep
from service.api.examples import response_examples
from service.api.schemas import HealthRead, ReadinessRead
from service.recall.errors import Unavailable
from service.storage.migrate import current_revision, head_revision

from . import problem_responses

router = APIRouter(tags=["health"])


@router.get(
    "/healthz",
    response_model=HealthRead,
    responses={200: response_examples("HealthRead"), **problem_responses()},
)
async def healthz() -> HealthRead:
    """Answer while the process runs; checks nothing else."""
    return HealthRead()


def _readiness(url: str) -> ReadinessRead:
    try:
        current = current_revision(url)
    except Exception:
        # Any driver error means the same to a probe: not reachable now.
        return ReadinessRead(ready=False, database=False, migrations_at_head=False)
    at_head = current == head_revision()
    return ReadinessRead(ready=at_head, database=True, migrations_at_head=at_head)


@router.get(
    "/readyz",
    response_model=ReadinessRead,
    responses={200: response_examples("ReadinessRead"), **problem_responses("unavailable")},
)
async def readyz(request: Request, settings: SettingsDep) -> ReadinessRead:
    """Answer 200 when the database is reachable and its migrations are at the head."""
    lifecycle = getattr(request.app.state, "lifecycle", None)
    if lifecycle is not None and lifecycle.draining:
        # Checked first: a worker on its way out must leave the pool whatever the database says.
        raise Unavailable(
            "the service is shutting down; requests in flight are being finished",
            shutting_down=True,
        )
    state = await run_in_threadpool(_readiness, settings.resolved_database_url)
    if not state.ready:
        reason = (
            "the database cannot be reached"
            if not state.database
            else "the database is not at the newest migration; run `cuebank migrate`"
        )
        raise Unavailable(
            reason, database=state.database, migrations_at_head=state.migrations_at_head
        )
    return state
