"""Collections: create, list, read, change, delete, compile, capacity."""

from __future__ import annotations

import copy

import httpx
import pytest

from .conftest import BASE, COLLECTION, SEED, assert_problem

pytestmark = pytest.mark.anyio


class TestCreateCollection:
    async def test_new_collection_is_created_with_its_location(
        self, client: httpx.AsyncClient
    ) -> None:
        r = await client.post("/v1/collections", json=SEED["collection"])
        assert r.status_code == 201
        assert r.headers["location"] == BASE
        body = r.json()
        assert body["name"] == COLLECTION
        assert body["revision"] == 0
        assert body["n_memories"] == 0
        assert [f["name"] for f in body["schema"]["fields"]][-1] == "depth_m"

    async def test_duplicate_name_is_a_409(self, client: httpx.AsyncClient) -> None:
        await client.post("/v1/collections", json=SEED["collection"])
        r = await client.post("/v1/collections", json=SEED["collection"])
        body = assert_problem(r, 409, "collection-exists")
        assert COLLECTION in body["detail"]
        assert body["instance"] == "/v1/collections"

    async def test_unknown_member_is_named_in_a_422(self, client: httpx.AsyncClient) -> None:
        spec = {**SEED["collection"], "rulez": "dense"}
        body = assert_problem(
            await client.post("/v1/collections", json=spec), 422, "invalid-request"
        )
        assert body["errors"] == [{"field": "rulez", "reason": "there is no such field"}]
        assert "'rulez'" in body["detail"]

    async def test_number_field_without_tolerance_is_an_invalid_schema(
        self, client: httpx.AsyncClient
    ) -> None:
        spec = copy.deepcopy(SEED["collection"])
        del spec["schema"]["fields"][4]["tolerance"]
        body = assert_problem(
            await client.post("/v1/collections", json=spec), 422, "invalid-schema"
        )
        assert body["field"] == "depth_m"

    async def test_bad_name_is_a_422_naming_the_name(self, client: httpx.AsyncClient) -> None:
        spec = {**SEED["collection"], "name": "Salt Marsh!"}
        body = assert_problem(
            await client.post("/v1/collections", json=spec), 422, "invalid-request"
        )
        assert body["errors"][0]["field"] == "name"


class TestListCollections:
    async def test_empty_team_lists_nothing(self, client: httpx.AsyncClient) -> None:
        r = await client.get("/v1/collections")
        assert r.status_code == 200
        assert r.json() == {"items": []}

    async def test_seeded_collection_is_listed_with_its_count(
        self, seeded: httpx.AsyncClient
    ) -> None:
        [item] = (await seeded.get("/v1/collections")).json()["items"]
        assert item["name"] == COLLECTION
        assert item["n_memories"] == len(SEED["memories"])


class TestGetCollection:
    async def test_existing_collection_is_returned(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.get(BASE)
        assert r.status_code == 200
        assert r.json()["revision"] == len(SEED["memories"])

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        body = assert_problem(
            await client.get("/v1/collections/smp-nothing"), 404, "collection-not-found"
        )
        assert "smp-nothing" in body["detail"]


class TestUpdateCollection:
    async def test_description_changes_and_the_rest_stays(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.patch(BASE, json={"description": "North marsh only"})
        assert r.status_code == 200
        assert r.json()["description"] == "North marsh only"
        assert r.json()["rule"] == "dense"

    async def test_rule_can_be_switched(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.patch(BASE, json={"rule": "hebbian"})
        assert r.status_code == 200
        assert r.json()["rule"] == "hebbian"

    async def test_unknown_verdict_option_is_a_422(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.patch(BASE, json={"verdict_options": {"max_stepz": 3}})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "verdict_options.max_stepz"

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.patch("/v1/collections/smp-nothing", json={"description": "x"})
        assert_problem(r, 404, "collection-not-found")


class TestDeleteCollection:
    async def test_deleted_collection_is_gone(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.delete(BASE)
        assert r.status_code == 204
        assert r.content == b""
        assert_problem(await seeded.get(BASE), 404, "collection-not-found")

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        assert_problem(
            await client.delete("/v1/collections/smp-nothing"), 404, "collection-not-found"
        )


class TestCompile:
    async def test_compile_reports_the_revision_and_counts(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(f"{BASE}/compile")
        assert r.status_code == 200
        body = r.json()
        assert body["revision"] == len(SEED["memories"])
        assert body["n_memories"] == len(SEED["memories"])
        assert body["rule"] == "dense"
        assert len(body["checksum"]) == 64

    async def test_empty_collection_is_a_409(self, client: httpx.AsyncClient) -> None:
        await client.post("/v1/collections", json=SEED["collection"])
        assert_problem(await client.post(f"{BASE}/compile"), 409, "collection-empty")

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.post("/v1/collections/smp-nothing/compile")
        assert_problem(r, 404, "collection-not-found")


class TestCapacity:
    async def test_capacity_report_names_the_rule_and_load(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.get(f"{BASE}/capacity")
        assert r.status_code == 200
        report = r.json()["report"]
        assert report["rule"] == "dense"
        assert report["n_memories"] == len(SEED["memories"])

    async def test_empty_collection_is_a_409(self, client: httpx.AsyncClient) -> None:
        await client.post("/v1/collections", json=SEED["collection"])
        assert_problem(await client.get(f"{BASE}/capacity"), 409, "collection-empty")

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.get("/v1/collections/smp-nothing/capacity")
        assert_problem(r, 404, "collection-not-found")
