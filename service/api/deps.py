"""Dependencies the routers declare, as ``Annotated`` aliases.

The service and settings are built once in the app's lifespan and kept on ``app.state``; these
hand them to each request. The caller's identity comes from the key the authentication
middleware checked (:mod:`service.api.security`); what a route requires of it is declared on
the route with one line::

    @router.post("/things", dependencies=[RequireScope("write")])

A route without a ``RequireScope`` is still authenticated (the middleware lets no keyless call
through), and ``tests/api/test_auth.py`` fails for any non-public route that names no scope.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any

from fastapi import Depends, Request
from fastapi.params import Depends as DependsParam
from starlette.concurrency import run_in_threadpool
from starlette.routing import BaseRoute

from service.recall.auth import Forbidden, KeyService, Principal, Scope, Unauthenticated
from service.recall.service import RecallService
from service.settings import Settings

__all__ = [
    "AuditDep",
    "Auditor",
    "CurrentPrincipal",
    "CurrentTeam",
    "KeysDep",
    "RequireScope",
    "ScopeCheck",
    "ServiceDep",
    "SettingsDep",
    "current_principal",
    "current_team",
    "get_service",
    "route_scope",
]


async def get_service(request: Request) -> RecallService:
    service: RecallService = request.app.state.service
    return service


async def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


async def get_keys(request: Request) -> KeyService:
    keys: KeyService = request.app.state.keys
    return keys


async def current_principal(request: Request) -> Principal:
    """The key the authentication middleware accepted for this request."""
    principal = request.scope.get("state", {}).get("principal")
    if not isinstance(principal, Principal):
        # Only reachable if a route is mounted on a public path; refuse rather than guess.
        raise Unauthenticated(
            "this endpoint needs an API key: send 'Authorization: Bearer <key>'", invalid=False
        )
    return principal


CurrentPrincipal = Annotated[Principal, Depends(current_principal)]


async def current_team(principal: CurrentPrincipal) -> str:
    """The caller's team: the team its key belongs to."""
    return principal.team


class ScopeCheck:
    """The dependency behind :func:`RequireScope`: refuses keys without ``scope`` (403)."""

    def __init__(self, scope: Scope) -> None:
        self.scope = scope

    def __repr__(self) -> str:
        return f"ScopeCheck({self.scope!r})"

    async def __call__(self, principal: CurrentPrincipal) -> Principal:
        if not principal.allows(self.scope):
            have = ", ".join(sorted(principal.scopes)) or "none"
            raise Forbidden(
                f"this call needs a key with the '{self.scope}' scope; key "
                f"{principal.key_prefix} has: {have}",
                scope=self.scope,
            )
        return principal


def RequireScope(scope: Scope) -> Any:
    """``dependencies=[RequireScope("write")]``: the route needs a key with ``scope``."""
    return Depends(ScopeCheck(scope))


def route_scope(route: BaseRoute) -> str | None:
    """The scope a route requires, from its ``RequireScope`` dependency; None if it has none."""
    pending: list[Any] = list(getattr(route, "dependencies", []) or [])
    dependant = getattr(route, "dependant", None)
    if dependant is not None:
        pending.extend(d.call for d in dependant.dependencies)
    for item in pending:
        call = item.dependency if isinstance(item, DependsParam) else item
        if isinstance(call, ScopeCheck):
            return call.scope
    return None


@dataclass(frozen=True)
class Auditor:
    """Writes the current caller's actions to its team's audit log."""

    keys: KeyService
    principal: Principal

    def record(
        self,
        action: str,
        *,
        collection: str | None = None,
        memory_key: str | None = None,
        detail: dict[str, Any] | None = None,
    ) -> None:
        self.keys.record(
            self.principal, action, collection=collection, memory_key=memory_key, detail=detail
        )

    async def arecord(
        self,
        action: str,
        *,
        collection: str | None = None,
        memory_key: str | None = None,
        detail: dict[str, Any] | None = None,
    ) -> None:
        await run_in_threadpool(
            lambda: self.record(action, collection=collection, memory_key=memory_key, detail=detail)
        )


async def get_auditor(request: Request, principal: CurrentPrincipal) -> Auditor:
    return Auditor(await get_keys(request), principal)


ServiceDep = Annotated[RecallService, Depends(get_service)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
KeysDep = Annotated[KeyService, Depends(get_keys)]
CurrentTeam = Annotated[str, Depends(current_team)]
AuditDep = Annotated[Auditor, Depends(get_auditor)]
