"""Keys, scopes and teams over HTTP: who may call what, and what nobody may see.

The matrix sends every endpoint as nine callers: no key, a malformed, an unknown, a revoked and
an expired key, a key of each scope, and an admin key of another team. Every answer is checked,
and after every call of the other team the first team's data is checked to be untouched.
"""

from __future__ import annotations

import json
import logging
import re
import shutil
from collections.abc import AsyncIterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import anyio
import httpx
import pytest
from fastapi import FastAPI

from service.api.app import create_app
from service.api.logs import JsonFormatter
from service.api.security import protected_routes
from service.recall.auth import KeyService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.keys import ApiKeyRepository

from .conftest import CUE, FIELDS, PROBLEM, SEED, UNLIMITED, assert_problem, bearer

pytestmark = pytest.mark.anyio

COLL = SEED["collection"]["name"]
KEYS = list(SEED["memories"])
OTHER_TEAM = "harrow"
SECRET_RE = re.compile(r"cb_[a-z0-9]{8}_[A-Za-z0-9_-]{43}")


@dataclass(frozen=True)
class World:
    """A data directory with the seed collection and one key of each kind, to copy per test."""

    data_dir: Path
    secrets: dict[str, str]
    prefixes: dict[str, str]


def _settings(data_dir: Path, **overrides: Any) -> Settings:
    return Settings(data_dir=data_dir, **{**UNLIMITED, **overrides})


async def _populate(data_dir: Path, secrets: dict[str, str], prefixes: dict[str, str]) -> None:
    app = create_app(_settings(data_dir))
    async with app.router.lifespan_context(app):
        keys = app.state.keys
        keys.ensure_team("default")
        keys.ensure_team(OTHER_TEAM)
        for name, team, scopes in [
            ("read", "default", ["read"]),
            ("write", "default", ["write"]),
            ("admin", "default", ["read", "write", "admin"]),
            ("revoked", "default", ["read", "write", "admin"]),
            ("expired", "default", ["read", "write", "admin"]),
            ("other_admin", OTHER_TEAM, ["read", "write", "admin"]),
        ]:
            info, secrets[name] = keys.create_key(team, scopes, label=name)
            prefixes[name] = info.prefix
        keys.revoke_key(prefixes["revoked"], team="default")
        transport = httpx.ASGITransport(app=app)
        headers = bearer(secrets["admin"])
        async with httpx.AsyncClient(transport=transport, base_url="http://t",
                                     headers=headers) as client:  # fmt: skip
            assert (await client.post("/v1/collections", json=SEED["collection"])).is_success
            for key, fields in SEED["memories"].items():
                r = await client.put(f"{C}/memories/{key}", json={"fields": fields})
                assert r.status_code == 201, r.text


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory, migrated_template: Path) -> World:
    data_dir = tmp_path_factory.mktemp("world") / "data"
    data_dir.mkdir()
    shutil.copyfile(migrated_template, data_dir / "cuebank.sqlite3")
    secrets: dict[str, str] = {}
    prefixes: dict[str, str] = {}
    anyio.run(_populate, data_dir, secrets, prefixes)
    engine = make_engine(_settings(data_dir).resolved_database_url)
    try:
        with make_session_factory(engine).begin() as session:
            row = ApiKeyRepository(session).get_by_prefix(prefixes["expired"])
            assert row is not None
            row.expires_at = datetime.now(UTC) - timedelta(minutes=1)
    finally:
        engine.dispose()
    return World(data_dir, secrets, prefixes)


@pytest.fixture
async def fresh(world: World, tmp_path: Path) -> AsyncIterator[Any]:
    """Build apps on copies of the world, each with its lifespan entered."""
    apps: list[Any] = []

    async def make(**overrides: Any) -> tuple[FastAPI, httpx.AsyncClient]:
        data_dir = tmp_path / f"data-{len(apps)}"
        shutil.copytree(world.data_dir, data_dir)
        app = create_app(_settings(data_dir, **overrides))
        ctx = app.router.lifespan_context(app)
        await ctx.__aenter__()
        client = httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://t")
        apps.append((ctx, client))
        return app, client

    yield make
    for ctx, client in reversed(apps):
        await client.aclose()
        await ctx.__aexit__(None, None, None)


# ---------------------------------------------------------------------- the matrix


@dataclass(frozen=True)
class Endpoint:
    method: str
    path: str
    scope: str
    ok: int
    #: What an admin of another team gets: 404 for anything inside a collection or key of the
    #: first team; team-level lists and creations answer for the other team's own data.
    other: int
    body: dict[str, Any] | None = None
    content: bytes | None = None
    media: str | None = None

    @property
    def id(self) -> str:
        return f"{self.method} {self.path}"


C = f"/v1/collections/{COLL}"
NO_JOB = "00000000-0000-4000-8000-000000000000"
ENDPOINTS = [
    Endpoint("POST", "/v1/collections", "admin", 201, 201,
             body={**SEED["collection"], "name": "probe"}),
    Endpoint("GET", "/v1/collections", "read", 200, 200),
    Endpoint("GET", C, "read", 200, 404),
    Endpoint("PATCH", C, "admin", 200, 404, body={"description": "changed"}),
    Endpoint("DELETE", C, "admin", 204, 404),
    Endpoint("POST", f"{C}/compile", "admin", 200, 404),
    Endpoint("GET", f"{C}/capacity", "read", 200, 404),
    Endpoint("PUT", f"{C}/memories/SMP-9001", "write", 201, 404, body={"fields": FIELDS}),
    Endpoint("GET", f"{C}/memories/{KEYS[0]}", "read", 200, 404),
    Endpoint("DELETE", f"{C}/memories/{KEYS[0]}", "write", 204, 404),
    Endpoint("GET", f"{C}/memories", "read", 200, 404),
    Endpoint("POST", f"{C}/imports", "write", 200, 404,
             content=json.dumps({"key": "SMP-9002", "fields": FIELDS}).encode() + b"\n",
             media="application/x-ndjson"),
    Endpoint("POST", f"{C}/recall", "read", 200, 404, body={"cue": CUE}),
    Endpoint("POST", f"{C}/recall:batch", "read", 200, 404, body={"cues": [CUE, CUE]}),
    Endpoint("POST", f"{C}/reconciliations", "write", 202, 404,
             content=b"ref,taxon\nL-1,Spartina alterniflora\n", media="text/csv"),
    Endpoint("GET", f"/v1/reconciliations/{NO_JOB}", "read", 404, 404),
    Endpoint("GET", f"/v1/reconciliations/{NO_JOB}/result", "read", 404, 404),
    Endpoint("DELETE", f"/v1/reconciliations/{NO_JOB}", "write", 404, 404),
    Endpoint("POST", "/v1/keys", "admin", 201, 201, body={"scopes": ["read"]}),
    Endpoint("GET", "/v1/keys", "admin", 200, 200),
    Endpoint("DELETE", "/v1/keys/{read_prefix}", "admin", 204, 404),
    Endpoint("GET", "/v1/audit", "admin", 200, 200),
]  # fmt: skip
UNAUTHENTICATED = ("none", "malformed", "unknown", "revoked", "expired")
OWN = ("read", "write", "admin")


def _headers(world: World, caller: str, endpoint: Endpoint) -> dict[str, str]:
    headers = {"Content-Type": endpoint.media} if endpoint.media else {}
    if caller == "none":
        return headers
    if caller == "malformed":
        return {**headers, "Authorization": "Bearer not-a-key"}
    if caller == "unknown":
        return {**headers, **bearer("cb_zzzzzzzz_" + "A" * 43)}
    return {**headers, **bearer(world.secrets[caller])}


async def _send(
    client: httpx.AsyncClient, world: World, endpoint: Endpoint, caller: str
) -> httpx.Response:
    path = endpoint.path.replace("{read_prefix}", world.prefixes["read"])
    return await client.request(
        endpoint.method,
        path,
        json=endpoint.body,
        content=endpoint.content,
        headers=_headers(world, caller, endpoint),
    )


async def _first_team_state(client: httpx.AsyncClient, world: World) -> Any:
    admin = bearer(world.secrets["admin"])
    coll = (await client.get(C, headers=admin)).json()
    page = (await client.get(f"{C}/memories", headers=admin)).json()
    keys = (await client.get("/v1/keys", headers=admin)).json()
    return (
        coll["revision"],
        coll["description"],
        [(m["key"], m["fields"]) for m in page["items"]],
        [(k["prefix"], k["state"]) for k in keys["items"]],
    )


class TestAuthorisationMatrix:
    def test_the_matrix_covers_every_route_that_needs_a_key(self, app: FastAPI) -> None:
        served = {(m, path) for path, methods, _ in protected_routes(app.routes) for m in methods}
        covered = set()
        for e in ENDPOINTS:
            path = re.sub(r"^/v1/collections/[^/]+", "/v1/collections/{name}", e.path)
            path = re.sub(r"/memories/.+$", "/memories/{key}", path)
            path = path.replace(NO_JOB, "{job_id}").replace("{read_prefix}", "{prefix}")
            covered.add((e.method, path))
        assert served == covered

    def test_every_route_that_needs_a_key_declares_its_scope(self, app: FastAPI) -> None:
        missing = [
            f"{sorted(methods)} {path}"
            for path, methods, scope in protected_routes(app.routes)
            if scope is None
        ]
        assert not missing, missing

    def test_the_declared_scopes_are_the_documented_ones(self, app: FastAPI) -> None:
        doc = app.openapi()
        assert doc["components"]["securitySchemes"]["bearerAuth"]["scheme"] == "bearer"
        for path, methods, scope in protected_routes(app.routes):
            for method in methods:
                op = doc["paths"][path][method.lower()]
                assert op["x-scope"] == scope
                assert op["security"] == [{"bearerAuth": []}]
                assert {"401", "403", "429"} <= set(op["responses"])
        for path in ("/healthz", "/readyz", "/problems/{slug}"):
            assert "security" not in doc["paths"][path]["get"]

    @pytest.mark.parametrize("endpoint", ENDPOINTS, ids=lambda e: e.id)
    async def test_each_caller_gets_the_expected_answer(
        self, endpoint: Endpoint, world: World, fresh: Any
    ) -> None:
        _, client = await fresh()
        for caller in UNAUTHENTICATED:
            r = await _send(client, world, endpoint, caller)
            assert_problem(r, 401, "unauthenticated")
            challenge = r.headers["www-authenticate"]
            assert challenge.startswith("Bearer")
            assert ("invalid_token" in challenge) == (caller != "none")
        for caller in OWN:
            allowed = caller == "admin" or caller == endpoint.scope
            if not allowed:
                r = await _send(client, world, endpoint, caller)
                body = assert_problem(r, 403, "forbidden")
                assert body["scope"] == endpoint.scope
                continue
            _, own = await fresh()  # a permitted call may change the data; start it clean
            r = await _send(own, world, endpoint, caller)
            assert r.status_code == endpoint.ok, f"{caller}: {r.text}"
        _, other = await fresh()
        before = await _first_team_state(other, world)
        r = await _send(other, world, endpoint, "other_admin")
        assert r.status_code == endpoint.other, r.text
        if endpoint.other == 404:
            assert r.headers["content-type"] == PROBLEM
        else:
            assert COLL not in r.text
            assert world.prefixes["admin"] not in r.text
        assert await _first_team_state(other, world) == before


class TestAnotherTeamsCollection:
    @pytest.mark.parametrize(
        "suffix", ["", "/memories", f"/memories/{KEYS[0]}", "/capacity"], ids=repr
    )
    async def test_it_answers_exactly_like_a_collection_that_does_not_exist(
        self, suffix: str, world: World, fresh: Any
    ) -> None:
        _, client = await fresh()
        headers = bearer(world.secrets["other_admin"])
        theirs = await client.get(f"/v1/collections/{COLL}{suffix}", headers=headers)
        missing = await client.get(f"/v1/collections/{COLL}{suffix}", headers=headers)
        nowhere = await client.get(f"/v1/collections/no-such-coll{suffix}", headers=headers)
        assert theirs.status_code == missing.status_code == nowhere.status_code == 404
        assert theirs.json() == json.loads(nowhere.text.replace("no-such-coll", COLL))
        assert theirs.headers.keys() - {"x-request-id"} == nowhere.headers.keys() - {"x-request-id"}


class TestTheBearerHeader:
    async def test_a_key_in_the_query_string_is_not_accepted(
        self, world: World, fresh: Any
    ) -> None:
        _, client = await fresh()
        for name in ("key", "api_key", "access_token", "token"):
            r = await client.get("/v1/collections", params={name: world.secrets["admin"]})
            assert_problem(r, 401, "unauthenticated")

    async def test_public_paths_need_no_key(self, fresh: Any) -> None:
        _, client = await fresh()
        for path in ("/healthz", "/readyz", "/openapi.json", "/docs", "/docs/docs.js",
                     "/problems/forbidden"):  # fmt: skip
            assert (await client.get(path)).status_code == 200, path

    async def test_an_unknown_path_without_a_key_is_401_not_404(self, fresh: Any) -> None:
        # Unauthenticated callers learn nothing about which paths exist.
        _, client = await fresh()
        assert_problem(await client.get("/v1/secret-admin-panel"), 401, "unauthenticated")

    async def test_a_body_is_not_read_before_the_key_is_checked(self, fresh: Any) -> None:
        _, client = await fresh()
        sent = 0

        async def endless() -> AsyncIterator[bytes]:
            nonlocal sent
            for _ in range(10_000):
                sent += 1
                yield b"x" * 65536

        r = await client.post(f"{C}/recall", content=endless())
        assert_problem(r, 401, "unauthenticated")
        assert sent <= 2


class TestKeysOverHttp:
    async def test_an_admin_creates_lists_and_revokes_keys(self, world: World, fresh: Any) -> None:
        _, client = await fresh()
        admin = bearer(world.secrets["admin"])
        r = await client.post("/v1/keys", json={"scopes": ["read"], "label": "scanner",
                                                "expires_in_days": 30}, headers=admin)  # fmt: skip
        assert r.status_code == 201, r.text
        created = r.json()
        assert SECRET_RE.fullmatch(created["secret"])
        assert created["secret"].startswith(created["prefix"])
        listed = (await client.get("/v1/keys", headers=admin)).json()["items"]
        assert created["prefix"] in [k["prefix"] for k in listed]
        assert "secret" not in json.dumps(listed)
        new = bearer(created["secret"])
        assert (await client.get("/v1/collections", headers=new)).status_code == 200
        r = await client.delete(f"/v1/keys/{created['prefix']}", headers=admin)
        assert r.status_code == 204
        assert_problem(await client.get("/v1/collections", headers=new), 401, "unauthenticated")

    async def test_a_bad_key_request_is_a_422(self, world: World, fresh: Any) -> None:
        _, client = await fresh()
        admin = bearer(world.secrets["admin"])
        for body in ({"scopes": []}, {"scopes": ["root"]}, {"scopes": ["read"], "label": "\x07"},
                     {"scopes": ["read"], "expires_in_days": 0}):  # fmt: skip
            assert_problem(await client.post("/v1/keys", json=body, headers=admin), 422,
                           "invalid-request")  # fmt: skip


class TestAcceptedKeysAreRemembered:
    """A worker remembers keys it accepted for ``key_cache_seconds``; revocation bounds."""

    @staticmethod
    def _other_worker(app: FastAPI) -> KeyService:
        keys: KeyService = app.state.keys
        return KeyService(keys.settings, keys.sessions, keys.pepper)

    async def test_a_key_revoked_elsewhere_stops_working_within_the_cache_time(
        self, world: World, fresh: Any, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        app, client = await fresh(key_cache_seconds=5.0)
        new, secret = app.state.keys.create_key("default", ["read"], label="cached")
        key = bearer(secret)
        assert (await client.get("/v1/collections", headers=key)).status_code == 200
        self._other_worker(app).revoke_key(new.prefix, team="default")
        # still remembered by this worker ...
        assert (await client.get("/v1/collections", headers=key)).status_code == 200
        # ... until the cache time has passed
        later = datetime.now(UTC) + timedelta(seconds=6)
        monkeypatch.setattr("service.recall.auth._now", lambda: later)
        assert_problem(await client.get("/v1/collections", headers=key), 401, "unauthenticated")

    async def test_with_no_cache_time_every_request_asks_the_database(
        self, world: World, fresh: Any
    ) -> None:
        app, client = await fresh(key_cache_seconds=0)
        new, secret = app.state.keys.create_key("default", ["read"], label="uncached")
        key = bearer(secret)
        assert (await client.get("/v1/collections", headers=key)).status_code == 200
        self._other_worker(app).revoke_key(new.prefix, team="default")
        assert_problem(await client.get("/v1/collections", headers=key), 401, "unauthenticated")

    async def test_a_key_is_never_remembered_past_its_expiry(
        self, world: World, fresh: Any, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        app, client = await fresh(key_cache_seconds=300)
        _, secret = app.state.keys.create_key("default", ["read"], expires_in_days=1)
        key = bearer(secret)
        assert (await client.get("/v1/collections", headers=key)).status_code == 200
        later = datetime.now(UTC) + timedelta(days=1, seconds=1)
        monkeypatch.setattr("service.recall.auth._now", lambda: later)
        assert_problem(await client.get("/v1/collections", headers=key), 401, "unauthenticated")

    async def test_refused_keys_are_not_remembered(self, world: World, fresh: Any) -> None:
        app, client = await fresh()
        for name in ("unknown", "revoked", "expired"):
            secret = world.secrets.get(name, "cb_00000000_" + "A" * 43)
            await client.get("/v1/collections", headers=bearer(secret))
        assert (
            app.state.keys.recently_accepted(bearer(world.secrets["revoked"])["Authorization"])
            is None
        )
        assert len(app.state.keys._accepted) == 0


class TestAuditOverHttp:
    async def test_writes_and_admin_actions_are_audited_without_bodies(
        self, world: World, fresh: Any
    ) -> None:
        _, client = await fresh()
        admin = bearer(world.secrets["admin"])
        writer = bearer(world.secrets["write"])
        secret_text = "Quercus secretus"
        await client.put(f"{C}/memories/SMP-7777", headers=writer,
                         json={"fields": {**FIELDS, "taxon": secret_text}})  # fmt: skip
        await client.delete(f"{C}/memories/SMP-7777", headers=writer)
        await client.post(f"{C}/compile", headers=admin)
        await client.patch(C, json={"description": "new words"}, headers=admin)
        await client.post(f"{C}/recall", json={"cue": CUE}, headers=admin)  # a read: not audited
        page = (await client.get("/v1/audit", params={"limit": 4}, headers=admin)).json()
        actions = [(e["action"], e["key_prefix"], e["collection"], e["memory_key"])
                   for e in page["items"]]  # fmt: skip
        assert actions == [
            ("collection.update", world.prefixes["admin"], COLL, None),
            ("collection.compile", world.prefixes["admin"], COLL, None),
            ("memory.delete", world.prefixes["write"], COLL, "SMP-7777"),
            ("memory.put", world.prefixes["write"], COLL, "SMP-7777"),
        ]
        assert page["next_cursor"]
        older = await client.get("/v1/audit", params={"cursor": page["next_cursor"]},
                                 headers=admin)  # fmt: skip
        assert older.status_code == 200
        assert older.json()["items"]
        everything = json.dumps(page) + older.text
        assert secret_text not in everything
        assert "new words" not in everything
        assert not SECRET_RE.search(everything)

    async def test_the_audit_log_is_the_teams_own(self, world: World, fresh: Any) -> None:
        _, client = await fresh()
        await client.delete(f"{C}/memories/{KEYS[1]}", headers=bearer(world.secrets["admin"]))
        other = await client.get("/v1/audit", headers=bearer(world.secrets["other_admin"]))
        assert COLL not in other.text
        assert KEYS[1] not in other.text


class TestRateLimits:
    async def test_a_key_over_its_burst_gets_429_with_retry_after(
        self, world: World, fresh: Any
    ) -> None:
        _, client = await fresh(rate_per_second=0.5, burst=3)
        headers = bearer(world.secrets["read"])
        statuses = [(await client.get("/v1/collections", headers=headers)).status_code
                    for _ in range(4)]  # fmt: skip
        assert statuses == [200, 200, 200, 429]
        r = await client.get("/v1/collections", headers=headers)
        body = assert_problem(r, 429, "rate-limited")
        assert body["limit"] == "rate_per_second"
        assert int(r.headers["retry-after"]) >= 1
        # another key has a bucket of its own
        assert (
            await client.get("/v1/collections", headers=bearer(world.secrets["admin"]))
        ).status_code == 200

    async def test_repeated_failed_keys_from_one_address_are_slowed_down(
        self, world: World, fresh: Any
    ) -> None:
        _, client = await fresh(auth_failures_per_minute=3)
        wrong = bearer("cb_zzzzzzzz_" + "B" * 43)
        statuses = [(await client.get("/v1/collections", headers=wrong)).status_code
                    for _ in range(4)]  # fmt: skip
        assert statuses == [401, 401, 401, 429]
        # Even the right key from that address waits out the minute: guesses cost time.
        r = await client.get("/v1/collections", headers=bearer(world.secrets["admin"]))
        body = assert_problem(r, 429, "rate-limited")
        assert body["limit"] == "auth_failures_per_minute"
        assert 1 <= int(r.headers["retry-after"]) <= 60

    def test_the_token_bucket_refills_at_its_rate(self) -> None:
        from service.api.security import TokenBuckets

        now = [0.0]
        buckets = TokenBuckets(rate=2.0, burst=2, clock=lambda: now[0])
        assert [buckets.take("k") for _ in range(2)] == [0.0, 0.0]
        assert buckets.take("k") == pytest.approx(0.5)
        now[0] = 0.5
        assert buckets.take("k") == 0.0

    def test_the_failure_window_ends_after_a_minute(self) -> None:
        from service.api.security import FailureLimiter

        now = [0.0]
        limiter = FailureLimiter(per_minute=2, clock=lambda: now[0])
        limiter.failed("a")
        limiter.failed("a")
        assert limiter.blocked_for("a") == pytest.approx(60.0)
        assert limiter.blocked_for("b") == 0.0
        now[0] = 60.0
        assert limiter.blocked_for("a") == 0.0


class TestSecretsStayHidden:
    async def test_no_secret_reaches_the_database_file_or_the_logs(
        self, world: World, fresh: Any, caplog: pytest.LogCaptureFixture
    ) -> None:
        caplog.set_level(logging.DEBUG)
        app, client = await fresh()
        admin = bearer(world.secrets["admin"])
        created = [(await client.post("/v1/keys", json={"scopes": ["read"]}, headers=admin))
                   .json()["secret"] for _ in range(3)]  # fmt: skip
        for secret in [*created, *world.secrets.values()]:
            await client.get("/v1/collections", headers=bearer(secret))
            await client.get(f"{C}/memories/{secret}", headers=bearer(secret))
        await client.get("/v1/collections", headers=bearer(created[0][:-1] + "x"))
        data_dir: Path = app.state.settings.data_dir
        stored = b"".join(p.read_bytes() for p in data_dir.iterdir()
                          if p.name.startswith("cuebank.sqlite3"))  # fmt: skip
        formatter = JsonFormatter()
        # The service's own records; the test's HTTP client logs the URLs it sends.
        logged = "\n".join(
            formatter.format(record) for record in caplog.records if record.name != "httpx"
        )
        assert "cuebank.access" in logged  # the request log was captured
        for secret in [*created, *world.secrets.values()]:
            assert secret.encode() not in stored
            assert secret not in logged
            # nor the random part alone
            assert secret[12:].encode() not in stored
            assert secret[12:] not in logged


class TestRequestLog:
    async def test_one_json_line_per_request_with_its_request_id(
        self, world: World, fresh: Any, caplog: pytest.LogCaptureFixture
    ) -> None:
        caplog.set_level(logging.INFO, logger="cuebank.access")
        _, client = await fresh()
        r = await client.get(f"{C}/memories/{KEYS[0]}", headers={
            **bearer(world.secrets["read"]), "X-Request-ID": "trace-42"})  # fmt: skip
        assert r.headers["x-request-id"] == "trace-42"
        [record] = [rec for rec in caplog.records if rec.name == "cuebank.access"]
        line = json.loads(JsonFormatter().format(record))
        assert line["request_id"] == "trace-42"
        assert line["route"] == "/v1/collections/{name}/memories/{key}"
        assert (line["status"], line["team"], line["key_prefix"]) == (
            200, "default", world.prefixes["read"])  # fmt: skip
        assert isinstance(line["duration_ms"], float)
        assert KEYS[0] not in json.dumps(line)  # the raw path (a memory key) is not logged

    async def test_an_unusable_request_id_is_replaced(self, fresh: Any) -> None:
        _, client = await fresh()
        r = await client.get("/healthz", headers={"X-Request-ID": "bad id\twith spaces"})
        assert re.fullmatch(r"[0-9a-f]{32}", r.headers["x-request-id"])
