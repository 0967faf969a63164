"""Keys and the audit log of the caller's team; both need the ``admin`` scope."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, Path, Query, Response, status
from starlette.concurrency import run_in_threadpool

from service.api.deps import CurrentPrincipal, KeysDep, RequireScope
from service.api.examples import openapi_examples, response_examples
from service.api.schemas import AuditPage, AuditRead, KeyCreate, KeyCreated, KeyPage, KeyRead
from service.recall.auth import KeyInfo

from . import BODY_PROBLEMS, problem_responses

router = APIRouter(tags=["keys"])


def key_read(info: KeyInfo) -> KeyRead:
    return KeyRead(
        prefix=info.prefix,
        scopes=info.scopes,
        label=info.label,
        state=info.state,
        created_at=info.created_at,
        expires_at=info.expires_at,
        revoked_at=info.revoked_at,
        last_used_at=info.last_used_at,
    )


@router.post(
    "/v1/keys",
    status_code=status.HTTP_201_CREATED,
    response_model=KeyCreated,
    dependencies=[RequireScope("admin")],
    responses={
        201: response_examples("KeyCreated"),
        **problem_responses(*BODY_PROBLEMS),
    },
)
async def create_key(
    body: Annotated[KeyCreate, Body(openapi_examples=openapi_examples("KeyCreate"))],
    keys: KeysDep,
    principal: CurrentPrincipal,
) -> KeyCreated:
    """Create a key for the caller's team; the secret is shown only in this answer."""
    info, secret = await run_in_threadpool(
        lambda: keys.create_key(
            principal.team,
            body.scopes,
            label=body.label,
            expires_in_days=body.expires_in_days,
            actor=principal.key_prefix,
        )
    )
    return KeyCreated(**key_read(info).model_dump(), secret=secret)


@router.get(
    "/v1/keys",
    response_model=KeyPage,
    dependencies=[RequireScope("admin")],
    responses={200: response_examples("KeyPage"), **problem_responses()},
)
async def list_keys(keys: KeysDep, principal: CurrentPrincipal) -> KeyPage:
    """List the team's keys, revoked and expired ones included (never their secrets)."""
    infos = await run_in_threadpool(keys.list_keys, principal.team)
    return KeyPage(items=[key_read(i) for i in infos])


@router.delete(
    "/v1/keys/{prefix}",
    status_code=status.HTTP_204_NO_CONTENT,
    response_class=Response,
    dependencies=[RequireScope("admin")],
    responses=problem_responses("key-not-found", "invalid-request"),
)
async def revoke_key(
    prefix: Annotated[str, Path(max_length=64, examples=["cb_k3x9q2mf"])],
    keys: KeysDep,
    principal: CurrentPrincipal,
) -> Response:
    """Revoke a key of the team; it stops working at once, on every worker."""
    await run_in_threadpool(
        lambda: keys.revoke_key(prefix, team=principal.team, actor=principal.key_prefix)
    )
    return Response(status_code=status.HTTP_204_NO_CONTENT)


@router.get(
    "/v1/audit",
    response_model=AuditPage,
    dependencies=[RequireScope("admin")],
    responses={
        200: response_examples("AuditPage"),
        **problem_responses("invalid-request", "invalid-cursor", "limit-exceeded-page"),
    },
)
async def read_audit(
    keys: KeysDep,
    principal: CurrentPrincipal,
    cursor: Annotated[
        str | None, Query(max_length=64, description="The next_cursor of the previous page.")
    ] = None,
    limit: Annotated[int | None, Query(ge=1, description="Page size.")] = None,
) -> AuditPage:
    """Read the team's audit log, newest first, a page at a time."""
    page = await run_in_threadpool(keys.audit_page, principal.team_id, cursor, limit)
    return AuditPage(
        items=[
            AuditRead(
                id=e.id,
                key_prefix=e.key_prefix,
                action=e.action,
                collection=e.collection,
                memory_key=e.memory_key,
                detail=e.detail,
                created_at=e.created_at,
            )
            for e in page.items
        ],
        next_cursor=page.next_cursor,
    )
