"""Every hard limit, met exactly and then exceeded by one: accepted, then a 413/422 problem that
names the limit, the value asked for and the maximum."""

from __future__ import annotations

import json
from typing import Any

import httpx
import pytest

from .conftest import BASE, CSV, CUE, FIELDS, NDJSON, SEED, Make, assert_problem

pytestmark = pytest.mark.anyio


async def _seeded(make: Make, **overrides: Any) -> httpx.AsyncClient:
    client: httpx.AsyncClient = await make(**overrides)
    r = await client.post("/v1/collections", json=SEED["collection"])
    assert r.status_code == 201, r.text
    for key, fields in SEED["memories"].items():
        r = await client.put(f"{BASE}/memories/{key}", json={"fields": fields})
        assert r.status_code == 201, r.text
    return client


async def _labels(make: Make) -> httpx.AsyncClient:
    """A one-field collection whose text field allows 60 characters, the service's limit."""
    client: httpx.AsyncClient = await make(max_text_length=60)
    schema = {"fields": [{"name": "label", "kind": "text", "max_length": 60}]}
    r = await client.post("/v1/collections", json={"name": "labels", "schema": schema})
    assert r.status_code == 201, r.text
    r = await client.put("/v1/collections/labels/memories/L-1", json={"fields": {"label": "x"}})
    assert r.status_code == 201, r.text
    return client


def _limit(response: httpx.Response, status: int, limit: str, value: int, maximum: int) -> None:
    body = assert_problem(response, status, "limit-exceeded")
    assert (body["limit"], body["value"], body["maximum"]) == (limit, value, maximum)
    assert str(maximum) in body["detail"]


def _padded(doc: dict[str, Any], size: int) -> bytes:
    """``doc`` as JSON, padded with trailing spaces to exactly ``size`` bytes."""
    raw = json.dumps(doc).encode()
    assert len(raw) <= size
    return raw + b" " * (size - len(raw))


class TestBodySize:
    async def test_a_body_of_exactly_max_body_bytes_is_read(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_body_bytes=4096)
        headers = {"Content-Type": "application/json"}
        r = await client.post(f"{BASE}/recall", content=_padded({"cue": CUE}, 4096),
                              headers=headers)  # fmt: skip
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/recall", content=_padded({"cue": CUE}, 4097),
                              headers=headers)  # fmt: skip
        _limit(r, 413, "max_body_bytes", 4097, 4096)

    async def test_a_body_without_a_length_is_cut_at_the_cap(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_body_bytes=4096)

        async def chunks() -> Any:
            for _ in range(3):
                yield b" " * 2048

        r = await client.post(f"{BASE}/recall", content=chunks(),
                              headers={"Content-Type": "application/json"})  # fmt: skip
        body = assert_problem(r, 413, "limit-exceeded")
        assert body["limit"] == "max_body_bytes"

    async def test_an_import_of_exactly_max_bulk_body_bytes_is_read(
        self, make_client: Make
    ) -> None:
        client = await _seeded(make_client, max_body_bytes=4096, max_bulk_body_bytes=8192)
        line = json.dumps({"key": "SMP-0100", "fields": FIELDS}).encode() + b"\n"
        exact = line + b"\n" * (8192 - len(line))  # blank lines carry nothing
        r = await client.post(f"{BASE}/imports", content=exact, headers=NDJSON)
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/imports", content=exact + b"\n", headers=NDJSON)
        _limit(r, 413, "max_bulk_body_bytes", 8193, 8192)


class TestSchemaLimits:
    async def test_max_fields(self, make_client: Make) -> None:
        client = await make_client(max_fields=3)
        fields = [{"name": f"f{i}", "kind": "category", "units": 64} for i in range(4)]
        three = {"name": "three", "schema": {"fields": fields[:3]}}
        r = await client.post("/v1/collections", json=three)
        assert r.status_code == 201, r.text
        r = await client.post("/v1/collections",
                              json={"name": "four", "schema": {"fields": fields}})  # fmt: skip
        _limit(r, 422, "max_fields", 4, 3)

    async def test_max_units(self, make_client: Make) -> None:
        client = await make_client(max_units=128)

        def schema(units: int) -> dict[str, Any]:
            return {"fields": [{"name": "a", "kind": "category", "units": 64},
                               {"name": "b", "kind": "category", "units": units}]}  # fmt: skip

        r = await client.post("/v1/collections", json={"name": "fits", "schema": schema(64)})
        assert r.status_code == 201, r.text
        r = await client.post("/v1/collections", json={"name": "over", "schema": schema(72)})
        _limit(r, 422, "max_units", 136, 128)

    async def test_max_text_length_of_a_schema_field(self, make_client: Make) -> None:
        client = await make_client(max_text_length=40)

        def schema(length: int) -> dict[str, Any]:
            return {"fields": [{"name": "a", "kind": "text", "max_length": length}]}

        r = await client.post("/v1/collections", json={"name": "fits", "schema": schema(40)})
        assert r.status_code == 201, r.text
        r = await client.post("/v1/collections", json={"name": "over", "schema": schema(41)})
        _limit(r, 422, "max_text_length", 41, 40)


class TestRecordLimits:
    async def test_max_memories_one_at_a_time(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_memories=len(SEED["memories"]) + 1)
        r = await client.put(f"{BASE}/memories/SMP-0100", json={"fields": FIELDS})
        assert r.status_code == 201, r.text
        r = await client.put(f"{BASE}/memories/SMP-0101", json={"fields": FIELDS})
        n = len(SEED["memories"]) + 1
        _limit(r, 422, "max_memories", n + 1, n)

    async def test_max_memories_by_import(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_memories=len(SEED["memories"]) + 2)
        n = len(SEED["memories"]) + 2

        def rows(count: int) -> bytes:
            return b"".join(
                json.dumps({"key": f"SMP-02{i:02d}", "fields": FIELDS}).encode() + b"\n"
                for i in range(count)
            )

        r = await client.post(f"{BASE}/imports", content=rows(3), headers=NDJSON)
        _limit(r, 422, "max_memories", n + 1, n)
        r = await client.post(f"{BASE}/imports", content=rows(2), headers=NDJSON)
        assert r.status_code == 200, r.text

    async def test_max_text_length_of_a_value(self, make_client: Make) -> None:
        client = await _labels(make_client)
        r = await client.put(
            "/v1/collections/labels/memories/L-2", json={"fields": {"label": "M" * 60}}
        )
        assert r.status_code == 201, r.text
        r = await client.put(
            "/v1/collections/labels/memories/L-3", json={"fields": {"label": "M" * 61}}
        )
        # The schema's max_length (at most the service's limit) speaks first here.
        body = assert_problem(r, 422, "invalid-record")
        assert body["field"] == "label"
        assert "60" in body["detail"]

    async def test_key_length(self, make_client: Make) -> None:
        client = await _seeded(make_client)
        r = await client.put(f"{BASE}/memories/{'K' * 256}", json={"fields": FIELDS})
        assert r.status_code == 201, r.text
        r = await client.put(f"{BASE}/memories/{'K' * 257}", json={"fields": FIELDS})
        _limit(r, 422, "key_length", 257, 256)

    async def test_fields_in_a_record(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_fields=5)
        r = await client.put(f"{BASE}/memories/SMP-0100", json={"fields": FIELDS})
        assert r.status_code == 201, r.text
        r = await client.put(f"{BASE}/memories/SMP-0100",
                             json={"fields": {**FIELDS, "extra": "x"}})  # fmt: skip
        _limit(r, 422, "max_fields", 6, 5)

    async def test_description_length(self, make_client: Make) -> None:
        client = await _seeded(make_client)
        r = await client.patch(BASE, json={"description": "d" * 2000})
        assert r.status_code == 200, r.text
        r = await client.patch(BASE, json={"description": "d" * 2001})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "description"
        assert "2000" in body["errors"][0]["reason"]


class TestRecallLimits:
    async def test_max_batch(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_batch=4)
        r = await client.post(f"{BASE}/recall:batch", json={"cues": [CUE] * 4})
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/recall:batch", json={"cues": [CUE] * 5})
        _limit(r, 413, "max_batch", 5, 4)

    async def test_max_steps(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_steps=20)
        r = await client.post(f"{BASE}/recall", json={"cue": CUE, "options": {"max_steps": 20}})
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/recall", json={"cue": CUE, "options": {"max_steps": 21}})
        _limit(r, 422, "max_steps", 21, 20)

    async def test_fields_in_a_cue(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_fields=5)
        r = await client.post(f"{BASE}/recall", json={"cue": FIELDS})
        assert r.status_code == 200, r.text
        cue = {**FIELDS, **{f"x{i}": "y" for i in range(1)}}
        r = await client.post(f"{BASE}/recall", json={"cue": cue})
        _limit(r, 422, "max_fields", 6, 5)

    async def test_text_length_in_a_cue(self, make_client: Make) -> None:
        client = await _labels(make_client)
        r = await client.post("/v1/collections/labels/recall", json={"cue": {"label": "S" * 60}})
        assert r.status_code == 200, r.text
        r = await client.post("/v1/collections/labels/recall", json={"cue": {"label": "S" * 61}})
        _limit(r, 422, "max_text_length", 61, 60)


class TestJsonDepth:
    async def test_max_json_depth(self, make_client: Make) -> None:
        # Creating the seed collection sends {"schema": {"fields": [{...}]}}: four deep.
        client = await _seeded(make_client, max_json_depth=4)
        deeper = {"cues": [{"taxon": [["Spartina"]]}]}
        r = await client.post(f"{BASE}/recall:batch", json=deeper)
        _limit(r, 422, "max_json_depth", 5, 4)


class TestPages:
    async def test_max_page_size_of_memories(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_page_size=3, default_page_size=2)
        r = await client.get(f"{BASE}/memories", params={"limit": 3})
        assert r.status_code == 200
        assert len(r.json()["items"]) == 3
        _limit(await client.get(f"{BASE}/memories", params={"limit": 4}),
               422, "max_page_size", 4, 3)  # fmt: skip

    async def test_max_page_size_of_the_audit_log(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_page_size=3, default_page_size=2)
        assert (await client.get("/v1/audit", params={"limit": 3})).status_code == 200
        _limit(await client.get("/v1/audit", params={"limit": 4}), 422, "max_page_size", 4, 3)


class TestImportFiles:
    async def test_max_import_line_bytes(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_import_line_bytes=300)
        line = json.dumps({"key": "SMP-0100", "fields": FIELDS}).encode()
        exact = line + b" " * (300 - len(line))
        r = await client.post(f"{BASE}/imports", content=exact + b"\n", headers=NDJSON)
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/imports", content=exact + b" \n", headers=NDJSON)
        _limit(r, 422, "max_import_line_bytes", 301, 300)

    async def test_csv_columns(self, make_client: Make) -> None:
        client = await _seeded(make_client, max_fields=5)
        header = "key,taxon,collector,site_code,collected_on,depth_m"
        row = "SMP-0100,Littorina littorea,Maren Holt,SMP-N3,2024-09-03,0.8"
        r = await client.post(f"{BASE}/imports", content=f"{header}\n{row}\n", headers=CSV)
        assert r.status_code == 200, r.text
        r = await client.post(f"{BASE}/imports", content=f"{header},x\n{row},1\n", headers=CSV)
        _limit(r, 422, "max_fields", 7, 6)


class TestKeyLimits:
    async def test_label_length(self, make_client: Make) -> None:
        client = await make_client()
        r = await client.post("/v1/keys", json={"scopes": ["read"], "label": "l" * 128})
        assert r.status_code == 201, r.text
        r = await client.post("/v1/keys", json={"scopes": ["read"], "label": "l" * 129})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "label"

    async def test_expiry(self, make_client: Make) -> None:
        client = await make_client()
        r = await client.post("/v1/keys", json={"scopes": ["read"], "expires_in_days": 3650})
        assert r.status_code == 201, r.text
        r = await client.post("/v1/keys", json={"scopes": ["read"], "expires_in_days": 3651})
        assert_problem(r, 422, "invalid-request")
