"""Probes, problem-type descriptions, the offline docs and the startup check."""

from __future__ import annotations

import re
from pathlib import Path

import httpx
import pytest
from fastapi import FastAPI

from service.api.app import DatabaseNotReady, create_app
from service.api.errors import all_problem_types
from service.settings import Settings
from service.storage.migrate import downgrade

from .conftest import assert_problem

pytestmark = pytest.mark.anyio


class TestHealthz:
    async def test_running_process_answers_ok(self, client: httpx.AsyncClient) -> None:
        r = await client.get("/healthz")
        assert r.status_code == 200
        assert r.json() == {"status": "ok"}


class TestReadyz:
    async def test_migrated_database_is_ready(self, client: httpx.AsyncClient) -> None:
        r = await client.get("/readyz")
        assert r.status_code == 200
        assert r.json() == {"ready": True, "database": True, "migrations_at_head": True}

    async def test_database_behind_the_head_is_a_503(
        self, client: httpx.AsyncClient, settings: Settings
    ) -> None:
        downgrade(settings.resolved_database_url, "base")
        body = assert_problem(await client.get("/readyz"), 503, "unavailable")
        assert body["migrations_at_head"] is False
        assert "cuebank migrate" in body["detail"]


class TestStartup:
    async def test_unmigrated_database_refuses_to_start(self, tmp_path: Path) -> None:
        settings = Settings(data_dir=tmp_path)
        app = create_app(settings)
        with pytest.raises(DatabaseNotReady, match="cuebank migrate"):
            async with app.router.lifespan_context(app):
                pass

    async def test_migrate_flag_upgrades_then_starts(self, tmp_path: Path) -> None:
        app = create_app(Settings(data_dir=tmp_path), migrate=True)
        async with app.router.lifespan_context(app):
            transport = httpx.ASGITransport(app=app)
            async with httpx.AsyncClient(transport=transport, base_url="http://t") as c:
                assert (await c.get("/readyz")).status_code == 200


class TestProblemTypes:
    async def test_every_problem_type_is_described(self, client: httpx.AsyncClient) -> None:
        for slug, (title, status) in all_problem_types().items():
            r = await client.get(f"/problems/{slug}")
            assert r.status_code == 200, slug
            body = r.json()
            assert (body["title"], body["status"]) == (title, status)
            assert body["description"] != title, f"{slug} has no description of its own"

    async def test_unknown_problem_type_is_a_404(self, client: httpx.AsyncClient) -> None:
        assert_problem(await client.get("/problems/no-such-thing"), 404, "not-found")


class TestDocs:
    async def test_docs_page_loads_nothing_from_outside(self, client: httpx.AsyncClient) -> None:
        r = await client.get("/docs")
        assert r.status_code == 200
        assert "default-src 'self'" in r.headers["content-security-policy"]
        urls = re.findall(r"""(?:src|href)="([^"]+)\"""", r.text)
        assert urls
        assert all(u.startswith("/") for u in urls), urls
        for url in urls:
            assert (await client.get(url)).status_code == 200, url

    async def test_openapi_files_errors_as_problem_json(self, app: FastAPI) -> None:
        schema = app.openapi()
        for path, item in schema["paths"].items():
            for method, op in item.items():
                assert "422" in op["responses"] or not op.get("parameters"), (method, path)
                for status, response in op["responses"].items():
                    if status.startswith(("4", "5")):
                        assert list(response["content"]) == ["application/problem+json"]
        assert "HTTPValidationError" not in schema["components"]["schemas"]
