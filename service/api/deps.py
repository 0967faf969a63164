"""Dependencies the routers declare, as ``Annotated`` aliases.

The service and settings are built once in the app's lifespan and kept on ``app.state``; these
hand them to each request. The team is a dependency of its own so that API keys can replace the
single default team without touching a router.
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings

__all__ = ["CurrentTeam", "ServiceDep", "SettingsDep", "current_team", "get_service"]


async def get_service(request: Request) -> RecallService:
    service: RecallService = request.app.state.service
    return service


async def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


async def current_team() -> str:
    """The caller's team; every caller is the default team until API keys land."""
    return DEFAULT_TEAM


ServiceDep = Annotated[RecallService, Depends(get_service)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
CurrentTeam = Annotated[str, Depends(current_team)]
