"""SQLite durability settings reach the connections that serve requests."""

from __future__ import annotations

from pathlib import Path
from typing import Literal

import pytest
from sqlalchemy import text

from service.api.app import create_app
from service.settings import Settings

pytestmark = pytest.mark.anyio

# Source: SQLite documentation, "PRAGMA synchronous": 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA.
SYNCHRONOUS_CODES = {"NORMAL": 1, "FULL": 2}


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def test_full_is_the_default() -> None:
    assert Settings.model_fields["sqlite_synchronous"].default == "FULL"


@pytest.mark.parametrize("level", ["FULL", "NORMAL"])
async def test_synchronous_setting_is_applied_to_request_sessions(
    tmp_path: Path, level: Literal["FULL", "NORMAL"]
) -> None:
    app = create_app(Settings(data_dir=tmp_path, sqlite_synchronous=level), migrate=True)
    async with app.router.lifespan_context(app):
        # Through the service's own session factory: the connections requests actually use.
        with app.state.service.sessions() as session:
            assert session.execute(text("PRAGMA synchronous")).scalar() == SYNCHRONOUS_CODES[level]
            assert session.execute(text("PRAGMA journal_mode")).scalar() == "wal"
            assert session.execute(text("PRAGMA foreign_keys")).scalar() == 1
            assert session.execute(text("PRAGMA busy_timeout")).scalar() > 0
