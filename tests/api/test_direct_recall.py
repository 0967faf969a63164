"""The short paths for recalls (``service.api.direct``) answer as the routes do.

Two apps on one database, one with the short path and one without, are sent the same
requests: ordinary recalls, every kind of refusal and requests the short path must leave to
the route. Status, headers (but the request id) and body bytes must be equal, and the short
path must have answered exactly the ordinary ones.
"""

from __future__ import annotations

import asyncio
import json
from collections.abc import AsyncIterator
from typing import Any

import httpx
import pytest
from fastapi import FastAPI

from service.api.app import create_app
from service.api.direct import DirectRecallMiddleware
from service.api.logs import ACCESS_LOGGER
from service.settings import Settings

from .conftest import BASE, SEED, bearer, make_key, seed_specimens

pytestmark = pytest.mark.anyio

MEMORIES: dict[str, dict[str, Any]] = SEED["memories"]
FIRST = next(iter(MEMORIES.values()))

#: (body, content type) pairs the short path answers itself.
ORDINARY: list[Any] = [
    {"cue": FIRST},
    {"cue": {"taxon": FIRST["taxon"][:-2] + "xx", "site_code": FIRST["site_code"]}},
    {"cue": {"collector": "Someone Else Entirely"}},
    {"cue": {"depth_m": 3}, "options": {"top_k": 7}},
    {"cue": {"taxon": FIRST["taxon"]}, "options": {"include_energy": True, "max_steps": 3}},
    {"cue": {"taxon": FIRST["taxon"]}, "options": {"mode": "async", "clamp": True}},
    *({"cue": dict(list(fields.items())[:2])} for fields in list(MEMORIES.values())[:6]),
]

#: Batch bodies the short path answers itself.
BATCHES: list[Any] = [
    {"cues": [b["cue"] for b in ORDINARY]},
    {"cues": [FIRST], "options": {"top_k": 2, "include_energy": True}},
    {"cues": [dict(list(f.items())[1:]) for f in MEMORIES.values()] * 3},
]

#: Batch bodies the route must answer.
BATCHES_REFUSED: list[Any] = [
    {"cues": []},
    {"cues": [FIRST, {"no_such_field": 1}]},
    {"cues": [FIRST], "options": {"mode": "sideways"}},
    {"cue": FIRST},
    {"cues": FIRST},
]

#: Bodies the route must answer: refusals of every kind.
REFUSED: list[Any] = [
    {"cue": {"no_such_field": "x"}},
    {"cue": {"depth_m": "deep"}},
    {"cue": {}},
    {"cue": FIRST, "extra": 1},
    {"cue": FIRST, "options": {"top_k": 0}},
    {"cue": FIRST, "options": {"max_steps": 10**9}},
    {"cues": [FIRST]},
    [FIRST],
    "cue",
    None,
]


JSON = {"Content-Type": "application/json"}


async def _open(app: FastAPI) -> Any:
    lifespan = app.router.lifespan_context(app)
    await lifespan.__aenter__()
    return lifespan


@pytest.fixture
async def pair(settings: Settings) -> AsyncIterator[tuple[httpx.AsyncClient, httpx.AsyncClient]]:
    """Clients of two apps on one seeded database: (short path on, short path off)."""
    apps = [create_app(settings), create_app(settings, direct_recall=False)]
    lifespans = [await _open(a) for a in apps]
    secret = make_key(apps[0])
    clients = [
        httpx.AsyncClient(
            transport=httpx.ASGITransport(app=a),
            base_url="http://cuebank.test",
            headers=bearer(secret),
        )
        for a in apps
    ]
    await seed_specimens(clients[1])
    try:
        yield clients[0], clients[1]
    finally:
        for client in clients:
            await client.aclose()
        for lifespan in reversed(lifespans):
            await lifespan.__aexit__(None, None, None)


def _short_path(app: FastAPI) -> DirectRecallMiddleware:
    layer: Any = app.middleware_stack
    while layer is not None and not isinstance(layer, DirectRecallMiddleware):
        layer = getattr(layer, "app", None)
    assert layer is not None, "the app has no short path for recalls"
    return layer


def _app(client: httpx.AsyncClient) -> FastAPI:
    transport = client._transport
    assert isinstance(transport, httpx.ASGITransport)
    app = transport.app
    assert isinstance(app, FastAPI)
    return app


async def _both(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
    content: bytes,
    *,
    path: str = f"{BASE}/recall",
    headers: dict[str, str] | None = None,
) -> tuple[httpx.Response, httpx.Response]:
    sent = {"Content-Type": "application/json", **(headers or {})}
    fast, slow = pair
    return (
        await fast.post(path, content=content, headers=sent),
        await slow.post(path, content=content, headers=sent),
    )


def _same(fast: httpx.Response, slow: httpx.Response) -> None:
    assert fast.status_code == slow.status_code, (fast.text, slow.text)
    strip = {"x-request-id"}
    assert [(k, v) for k, v in fast.headers.items() if k not in strip] == [
        (k, v) for k, v in slow.headers.items() if k not in strip
    ]
    assert fast.content == slow.content


async def test_ordinary_recalls_are_answered_by_the_short_path_as_the_route_answers(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
) -> None:
    for body in ORDINARY:
        fast, slow = await _both(pair, json.dumps(body).encode())
        assert fast.status_code == 200, fast.text
        _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == len(ORDINARY)


async def test_concurrent_recalls_settled_together_match_the_route_one_by_one(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
) -> None:
    bodies = [json.dumps(b).encode() for b in ORDINARY[:3] + ORDINARY[6:]] * 3
    fast, slow = pair
    answers = await asyncio.gather(
        *(
            fast.post(f"{BASE}/recall", content=b, headers={"Content-Type": "application/json"})
            for b in bodies
        )
    )
    for body, answer in zip(bodies, answers, strict=True):
        alone = await slow.post(
            f"{BASE}/recall", content=body, headers={"Content-Type": "application/json"}
        )
        _same(answer, alone)


@pytest.mark.parametrize("body", REFUSED, ids=range(len(REFUSED)))
async def test_refusals_come_from_the_route_unchanged(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient], body: Any
) -> None:
    fast, slow = await _both(pair, json.dumps(body).encode())
    assert fast.status_code >= 400
    _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == 0


@pytest.mark.parametrize(
    ("content", "headers", "path"),
    [
        pytest.param(b'{"cue": {"taxon": "x"}', {}, f"{BASE}/recall", id="truncated-json"),
        pytest.param(b"", {}, f"{BASE}/recall", id="empty-body"),
        pytest.param(b'{"cue": {"taxon": "\\ud800"}}', {}, f"{BASE}/recall", id="lone-surrogate"),
        pytest.param(
            json.dumps({"cue": FIRST}).encode(),
            {"Content-Type": "text/plain"},
            f"{BASE}/recall",
            id="not-json-type",
        ),
        pytest.param(
            json.dumps({"cue": FIRST}).encode(), {}, "/v1/collections/nowhere/recall", id="no-coll"
        ),
        pytest.param(
            json.dumps({"cue": FIRST}).encode(), {}, "/v1/collections/a%2Fb/recall", id="slash"
        ),
    ],
)
async def test_what_the_short_path_leaves_alone_is_answered_as_before(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
    content: bytes,
    headers: dict[str, str],
    path: str,
) -> None:
    fast, slow = await _both(pair, content, path=path, headers=headers)
    _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == 0


@pytest.mark.parametrize("scopes", [("write",), ("admin",), ("read",)])
async def test_scopes_are_checked_the_same_way(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient], scopes: tuple[str, ...]
) -> None:
    secret = make_key(_app(pair[0]), scopes)
    fast, slow = await _both(pair, json.dumps({"cue": FIRST}).encode(), headers=bearer(secret))
    _same(fast, slow)
    allowed = fast.status_code == 200
    assert allowed == _app(pair[0]).state.keys.recently_accepted(f"Bearer {secret}").allows("read")
    assert _short_path(_app(pair[0])).answered == int(allowed)


async def test_the_access_log_and_metrics_name_the_route_template(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient], caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level("INFO", logger=ACCESS_LOGGER)
    fast, _ = pair
    r = await fast.post(f"{BASE}/recall", json={"cue": FIRST})
    assert r.status_code == 200
    lines = [rec for rec in caplog.records if rec.name == ACCESS_LOGGER]
    assert lines
    assert lines[-1].route == "/v1/collections/{name}/recall"  # type: ignore[attr-defined]
    assert lines[-1].request_id == r.headers["x-request-id"]  # type: ignore[attr-defined]
    metrics = (await fast.get("/metrics")).text
    assert 'route="/v1/collections/{name}/recall",status="200"' in metrics
    assert 'verdict="recalled"' in metrics


async def test_ordinary_batches_are_answered_by_the_short_path_as_the_route_answers(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
) -> None:
    for body in BATCHES:
        fast, slow = await _both(pair, json.dumps(body).encode(), path=f"{BASE}/recall:batch")
        assert fast.status_code == 200, fast.text
        assert len(fast.json()["results"]) == len(body["cues"])
        _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == len(BATCHES)


async def test_concurrent_batches_settled_together_match_the_route_one_by_one(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
) -> None:
    # concurrent batch requests with equal options share engine runs on the short path; each
    # is answered as the route answers it alone, a refused one included (its cue numbered
    # within its own request), and the others in its run are answered all the same
    refused = {"cues": [FIRST, FIRST, {"no_such_field": 1}]}
    bodies = [json.dumps(b).encode() for b in [*BATCHES[::2], refused] * 3]
    fast, slow = pair
    queue = _app(fast).state.batch_queue
    runs_before = queue.runs
    answers = await asyncio.gather(
        *(fast.post(f"{BASE}/recall:batch", content=b, headers=JSON) for b in bodies)
    )
    for body, answer in zip(bodies, answers, strict=True):
        _same(answer, await slow.post(f"{BASE}/recall:batch", content=body, headers=JSON))
    assert [a.status_code for a in answers] == [200, 200, 422] * 3
    assert answers[2].json()["cue"] == 2
    assert _short_path(_app(fast)).answered == 6  # a fresh app: the ordinary ones
    assert 1 <= queue.runs - runs_before < len(bodies)  # runs were shared


@pytest.mark.parametrize("body", BATCHES_REFUSED, ids=range(len(BATCHES_REFUSED)))
async def test_refused_batches_come_from_the_route_unchanged(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient], body: Any
) -> None:
    fast, slow = await _both(pair, json.dumps(body).encode(), path=f"{BASE}/recall:batch")
    assert fast.status_code >= 400
    _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == 0


async def test_a_batch_over_the_limit_is_refused_by_the_route(
    make_client: Any,
) -> None:
    client = await make_client(max_batch=3)
    await seed_specimens(client)
    r = await client.post(f"{BASE}/recall:batch", json={"cues": [FIRST] * 4})
    assert r.status_code == 413
    assert r.json()["limit"] == "max_batch"
    assert _short_path(client.app).answered == 0
    ok = await client.post(f"{BASE}/recall:batch", json={"cues": [FIRST] * 3})
    assert ok.status_code == 200
    assert _short_path(client.app).answered == 1


async def test_a_body_the_single_parse_leaves_to_the_careful_path_still_gets_answered(
    pair: tuple[httpx.AsyncClient, httpx.AsyncClient],
) -> None:
    # a 30-digit number is read by the route's own parser: the short path steps aside
    body = b'{"cue": {"depth_m": 123456789012345678901234567890}}'
    fast, slow = await _both(pair, body)
    _same(fast, slow)
    assert _short_path(_app(pair[0])).answered == 0
