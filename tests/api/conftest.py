"""An app over a fresh SQLite database per test, with the lifespan entered.

Migrations run once per session on a template database; each test copies that file, which is
much faster than running Alembic again and gives the same schema.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi import FastAPI

from service.api.app import create_app
from service.api.examples import EXAMPLES_DIR
from service.settings import Settings
from service.storage.migrate import upgrade_to_head

SEED = json.loads((EXAMPLES_DIR / "seeds" / "specimens.json").read_text(encoding="utf-8"))
COLLECTION = SEED["collection"]["name"]
BASE = f"/v1/collections/{COLLECTION}"
PROBLEM = "application/problem+json"


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("template") / "cuebank.sqlite3"
    upgrade_to_head(f"sqlite:///{path.as_posix()}")
    return path


@pytest.fixture
def settings(tmp_path: Path, migrated_template: Path) -> Settings:
    data_dir = tmp_path / "data"
    data_dir.mkdir()
    shutil.copyfile(migrated_template, data_dir / "cuebank.sqlite3")
    return Settings(data_dir=data_dir, max_body_bytes=64 * 1024, max_bulk_body_bytes=256 * 1024)


@pytest.fixture
def app(settings: Settings) -> FastAPI:
    return create_app(settings)


@pytest.fixture
async def client(app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://cuebank.test") as c:
            yield c


async def seed_specimens(client: httpx.AsyncClient) -> None:
    """Create the demo collection and store its memories."""
    r = await client.post("/v1/collections", json=SEED["collection"])
    assert r.status_code == 201, r.text
    for key, fields in SEED["memories"].items():
        r = await client.put(f"{BASE}/memories/{key}", json={"fields": fields})
        assert r.status_code == 201, r.text


@pytest.fixture
async def seeded(client: httpx.AsyncClient) -> httpx.AsyncClient:
    await seed_specimens(client)
    return client


def assert_problem(response: httpx.Response, status: int, slug: str) -> dict[str, Any]:
    """Check ``response`` is an RFC 9457 problem of type ``slug``; return its body."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == PROBLEM
    body: dict[str, Any] = response.json()
    assert body["type"] == f"/problems/{slug}"
    assert body["status"] == status
    assert body["title"]
    assert body["detail"]
    return body


SeedFn = Callable[[httpx.AsyncClient], Any]
