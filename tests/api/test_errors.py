"""Bad input of every kind answers a 4xx problem document; only bugs answer 500."""

from __future__ import annotations

import httpx
import pytest
from fastapi import FastAPI

from .conftest import BASE, assert_problem

pytestmark = pytest.mark.anyio


class TestMalformedBodies:
    async def test_malformed_json_is_a_400_with_the_position(
        self, seeded: httpx.AsyncClient
    ) -> None:
        r = await seeded.post(
            f"{BASE}/recall",
            content=b'{"cue": {"taxon": "Zostera" "site_code": 1}}',
            headers={"content-type": "application/json"},
        )
        body = assert_problem(r, 400, "malformed-json")
        assert "character 28" in body["detail"]

    async def test_non_utf8_body_is_a_400_naming_the_byte(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(
            f"{BASE}/recall",
            content='{"cue": {"collector": "José Ruiz"}}'.encode("latin-1"),
            headers={"content-type": "application/json"},
        )
        body = assert_problem(r, 400, "malformed-body")
        assert "0xe9" in body["detail"]

    async def test_body_over_the_limit_is_a_413_naming_the_limit(
        self, seeded: httpx.AsyncClient
    ) -> None:
        cue = {"taxon": "x" * (70 * 1024)}
        r = await seeded.post(f"{BASE}/recall", json={"cue": cue})
        body = assert_problem(r, 413, "limit-exceeded")
        assert body["limit"] == "max_body_bytes"
        assert body["maximum"] == 64 * 1024

    async def test_streamed_body_over_the_limit_is_stopped_at_the_cap(
        self, seeded: httpx.AsyncClient
    ) -> None:
        async def chunks() -> object:
            yield b'{"cue": {"taxon": "'
            for _ in range(100):
                yield b"x" * 1024
            yield b'"}}'

        r = await seeded.post(
            f"{BASE}/recall",
            content=chunks(),  # type: ignore[arg-type]
            headers={"content-type": "application/json"},
        )
        assert_problem(r, 413, "limit-exceeded")

    async def test_missing_body_is_a_422_naming_the_body(self, seeded: httpx.AsyncClient) -> None:
        body = assert_problem(await seeded.post(f"{BASE}/recall"), 422, "invalid-request")
        assert body["errors"][0]["field"] == "body"


class TestUnknownRoutes:
    async def test_unknown_path_is_a_404_problem(self, client: httpx.AsyncClient) -> None:
        body = assert_problem(await client.get("/v1/colections"), 404, "not-found")
        assert body["instance"] == "/v1/colections"

    async def test_wrong_method_is_a_405_problem_with_allow(
        self, client: httpx.AsyncClient
    ) -> None:
        r = await client.delete("/v1/collections")
        assert_problem(r, 405, "method-not-allowed")
        assert "GET" in r.headers["allow"]


class TestUnexpectedErrors:
    async def test_unexpected_exception_is_a_500_without_internals(
        self,
        app: FastAPI,
        client: httpx.AsyncClient,
        monkeypatch: pytest.MonkeyPatch,
        caplog: pytest.LogCaptureFixture,
    ) -> None:
        def broken(team: str) -> None:
            raise RuntimeError("password=hunter2 in /srv/secret.py")

        monkeypatch.setattr(app.state.service, "list_collections", broken)
        r = await client.get("/v1/collections")
        body = assert_problem(r, 500, "internal")
        assert "hunter2" not in r.text
        assert "secret" not in body["detail"]
        assert "hunter2" in caplog.text
