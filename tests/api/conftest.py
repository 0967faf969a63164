"""An app over a fresh database per test, with the lifespan entered, on SQLite and PostgreSQL.

Migrations run once per session: on SQLite into a template file each test copies, on PostgreSQL
into one schema for the session whose tables are emptied before each test. Both are much faster
than running Alembic per test and give the same schema. The PostgreSQL variant runs when
CUEBANK_TEST_DATABASE_URL is set and is skipped, with that reason, otherwise. ``client``
carries an admin key of the team ``default``; ``make_key`` makes more (other scopes, other
teams).
"""

from __future__ import annotations

import json
import shutil
from collections.abc import AsyncIterator, Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from sqlalchemy import Engine, create_engine

from service.api.app import create_app
from service.api.examples import EXAMPLES_DIR
from service.recall.auth import KeyService
from service.settings import Settings
from service.storage.migrate import head_revision, upgrade_to_head

SEED = json.loads((EXAMPLES_DIR / "seeds" / "specimens.json").read_text(encoding="utf-8"))
COLLECTION = SEED["collection"]["name"]
BASE = f"/v1/collections/{COLLECTION}"
PROBLEM = "application/problem+json"
TEAM = "default"
ALL_SCOPES = ("read", "write", "admin")
#: Limiters wide open, so tests that are not about them never meet them.
UNLIMITED: dict[str, Any] = {
    "rate_per_second": 1e6,
    "burst": 1_000_000,
    "auth_failures_per_minute": 1_000_000,
}


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("template") / "cuebank.sqlite3"
    upgrade_to_head(f"sqlite:///{path.as_posix()}")
    return path


@pytest.fixture(scope="session")
def migrated_postgres(postgres_session_url: str) -> Iterator[tuple[str, Engine]]:
    upgrade_to_head(postgres_session_url)
    engine = create_engine(postgres_session_url)
    yield postgres_session_url, engine
    engine.dispose()


def _empty_postgres(url: str, engine: Engine) -> None:
    # A test may have downgraded the shared schema (the readiness test does); bring it back.
    with engine.connect() as connection:
        exists = connection.exec_driver_sql("SELECT to_regclass('alembic_version')").scalar()
        at = (
            connection.exec_driver_sql("SELECT max(version_num) FROM alembic_version").scalar()
            if exists
            else None
        )
    if at != head_revision():
        upgrade_to_head(url)
    # Every table but Alembic's, found in the catalogue so tables later migrations add are
    # emptied too; RESTART IDENTITY makes ids start over as they do in a fresh SQLite copy.
    with engine.begin() as connection:
        tables = connection.exec_driver_sql(
            "SELECT tablename FROM pg_tables WHERE schemaname = current_schema() "
            "AND tablename <> 'alembic_version'"
        ).scalars()
        names = ", ".join(f'"{name}"' for name in tables)
        if names:
            connection.exec_driver_sql(f"TRUNCATE {names} RESTART IDENTITY CASCADE")


@pytest.fixture(
    params=[
        pytest.param("sqlite", id="sqlite"),
        pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
    ]
)
def database_url(request: pytest.FixtureRequest, tmp_path: Path, migrated_template: Path) -> str:
    """A migrated, empty database: a copy of the SQLite template, or the emptied session schema."""
    if request.param == "postgresql":
        url, engine = request.getfixturevalue("migrated_postgres")
        _empty_postgres(url, engine)
        return str(url)
    path = tmp_path / "data" / "cuebank.sqlite3"
    path.parent.mkdir(exist_ok=True)
    shutil.copyfile(migrated_template, path)
    return f"sqlite:///{path.as_posix()}"


@pytest.fixture
def settings(tmp_path: Path, database_url: str) -> Settings:
    data_dir = tmp_path / "data"
    data_dir.mkdir(exist_ok=True)
    # Without a shared data directory PostgreSQL workers need the pepper configured.
    pepper = {} if database_url.startswith("sqlite") else {"key_pepper": "api-tests-" + "p" * 32}
    return Settings(
        data_dir=data_dir,
        database_url=database_url,
        max_body_bytes=64 * 1024,
        max_bulk_body_bytes=256 * 1024,
        **pepper,
        **UNLIMITED,
    )


@pytest.fixture
def app(settings: Settings) -> FastAPI:
    return create_app(settings)


def make_key(app: FastAPI, scopes: tuple[str, ...] = ALL_SCOPES, team: str = TEAM) -> str:
    """A new key's secret for ``team`` (created if missing); the app's lifespan must be on."""
    keys: KeyService = app.state.keys
    keys.ensure_team(team)
    _, secret = keys.create_key(team, scopes, label="test")
    return secret


def bearer(secret: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {secret}"}


@pytest.fixture
async def client(app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        headers = bearer(make_key(app))
        async with httpx.AsyncClient(
            transport=transport, base_url="http://cuebank.test", headers=headers
        ) as c:
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
#: What ``make_client`` is: settings overrides in, an admin client out.
Make = Callable[..., Any]

#: A memory that is not in the seed, and a cue that matches one that is.
FIELDS: dict[str, Any] = {
    "taxon": "Littorina littorea",
    "collector": "Maren Holt",
    "site_code": "SMP-N3",
    "collected_on": "2024-09-03",
    "depth_m": 0.8,
}
CUE: dict[str, Any] = {"taxon": "Spartina alterniflora", "site_code": "SMP-N3"}
JSON = {"Content-Type": "application/json"}
NDJSON = {"Content-Type": "application/x-ndjson"}
CSV = {"Content-Type": "text/csv"}


@pytest.fixture
async def make_client(tmp_path: Path, migrated_template: Path) -> AsyncIterator[Callable[..., Any]]:
    """Build apps with setting overrides; each gives a client holding an admin key."""
    opened: list[tuple[Any, httpx.AsyncClient]] = []

    async def make(**overrides: Any) -> httpx.AsyncClient:
        data_dir = tmp_path / f"data-{len(opened)}"
        data_dir.mkdir()
        shutil.copyfile(migrated_template, data_dir / "cuebank.sqlite3")
        limits = {"max_body_bytes": 64 * 1024, "max_bulk_body_bytes": 256 * 1024}
        app = create_app(Settings(data_dir=data_dir, **{**UNLIMITED, **limits, **overrides}))
        lifespan = app.router.lifespan_context(app)
        await lifespan.__aenter__()
        client = httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app),
            base_url="http://cuebank.test",
            headers=bearer(make_key(app)),
        )
        client.app = app  # type: ignore[attr-defined]
        opened.append((lifespan, client))
        return client

    yield make
    for lifespan, client in reversed(opened):
        await client.aclose()
        await lifespan.__aexit__(None, None, None)
