"""Memories: put, get, delete, list in pages, and bulk import."""

from __future__ import annotations

import json

import httpx
import pytest

from .conftest import BASE, SEED, assert_problem

pytestmark = pytest.mark.anyio

PERIWINKLE = {
    "taxon": "Littorina littorea",
    "collector": "Maren Holt",
    "site_code": "SMP-N3",
    "collected_on": "2024-09-03",
    "depth_m": 0.8,
}
HEADER = "key,taxon,collector,site_code,collected_on,depth_m\n"


class TestPutMemory:
    async def test_new_key_is_created_with_201_and_the_new_revision(
        self, seeded: httpx.AsyncClient
    ) -> None:
        r = await seeded.put(f"{BASE}/memories/SMP-0007", json={"fields": PERIWINKLE})
        assert r.status_code == 201
        body = r.json()
        assert body["created"] is True
        assert body["revision"] == len(SEED["memories"]) + 1
        assert r.headers["cuebank-revision"] == str(body["revision"])
        assert body["fields"] == PERIWINKLE

    async def test_existing_key_is_replaced_with_200(self, seeded: httpx.AsyncClient) -> None:
        fields = {**SEED["memories"]["SMP-0002"], "depth_m": 6.5}
        r = await seeded.put(f"{BASE}/memories/SMP-0002", json={"fields": fields})
        assert r.status_code == 200
        assert r.json()["created"] is False
        assert r.json()["fields"]["depth_m"] == 6.5

    async def test_depth_above_the_schema_maximum_is_an_invalid_record(
        self, seeded: httpx.AsyncClient
    ) -> None:
        fields = {**PERIWINKLE, "depth_m": 812.0}
        r = await seeded.put(f"{BASE}/memories/SMP-0007", json={"fields": fields})
        body = assert_problem(r, 422, "invalid-record")
        assert body["field"] == "depth_m"
        assert "500" in body["detail"]

    async def test_boolean_field_value_is_a_type_error(self, seeded: httpx.AsyncClient) -> None:
        fields = {**PERIWINKLE, "depth_m": True}
        r = await seeded.put(f"{BASE}/memories/SMP-0007", json={"fields": fields})
        body = assert_problem(r, 422, "invalid-request")
        assert any(e["field"].startswith("fields.depth_m") for e in body["errors"])

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.put(
            "/v1/collections/smp-nothing/memories/SMP-0007", json={"fields": PERIWINKLE}
        )
        assert_problem(r, 404, "collection-not-found")


class TestGetMemory:
    async def test_stored_memory_is_returned(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.get(f"{BASE}/memories/SMP-0003")
        assert r.status_code == 200
        assert r.json()["fields"] == SEED["memories"]["SMP-0003"]

    async def test_key_with_a_slash_round_trips(self, seeded: httpx.AsyncClient) -> None:
        await seeded.put(f"{BASE}/memories/tray-4/SMP-0100", json={"fields": PERIWINKLE})
        r = await seeded.get(f"{BASE}/memories/tray-4/SMP-0100")
        assert r.status_code == 200
        assert r.json()["key"] == "tray-4/SMP-0100"

    async def test_unknown_key_is_a_404(self, seeded: httpx.AsyncClient) -> None:
        body = assert_problem(
            await seeded.get(f"{BASE}/memories/SMP-0999"), 404, "memory-not-found"
        )
        assert body["key"] == "SMP-0999"


class TestDeleteMemory:
    async def test_deleted_memory_is_gone_and_the_revision_moves_on(
        self, seeded: httpx.AsyncClient
    ) -> None:
        r = await seeded.delete(f"{BASE}/memories/SMP-0001")
        assert r.status_code == 204
        assert r.headers["cuebank-revision"] == str(len(SEED["memories"]) + 1)
        assert_problem(await seeded.get(f"{BASE}/memories/SMP-0001"), 404, "memory-not-found")

    async def test_unknown_key_is_a_404(self, seeded: httpx.AsyncClient) -> None:
        assert_problem(await seeded.delete(f"{BASE}/memories/SMP-0999"), 404, "memory-not-found")


class TestListMemories:
    async def test_pages_follow_the_cursor_to_the_end_in_key_order(
        self, seeded: httpx.AsyncClient
    ) -> None:
        keys: list[str] = []
        cursor: str | None = None
        pages = 0
        while True:
            params: dict[str, str | int] = {"limit": 4}
            if cursor:
                params["cursor"] = cursor
            page = (await seeded.get(f"{BASE}/memories", params=params)).json()
            keys += [m["key"] for m in page["items"]]
            pages += 1
            cursor = page["next_cursor"]
            if cursor is None:
                break
        assert keys == sorted(SEED["memories"])
        assert pages == 2

    async def test_bad_cursor_is_a_422(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.get(f"{BASE}/memories", params={"cursor": "not-a-cursor"})
        body = assert_problem(r, 422, "invalid-cursor")
        assert body["field"] == "cursor"

    async def test_limit_that_is_not_a_number_is_a_422(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.get(f"{BASE}/memories", params={"limit": "lots"})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "limit"

    async def test_limit_above_the_page_size_limit_names_the_limit(
        self, seeded: httpx.AsyncClient
    ) -> None:
        r = await seeded.get(f"{BASE}/memories", params={"limit": 5000})
        body = assert_problem(r, 422, "limit-exceeded")
        assert body["limit"] == "max_page_size"
        assert body["maximum"] == 500


class TestImportMemories:
    async def test_ndjson_rows_are_stored_with_counts(self, seeded: httpx.AsyncClient) -> None:
        lines = [
            {"key": "SMP-0101", "fields": PERIWINKLE},
            {"key": "SMP-0002", "fields": SEED["memories"]["SMP-0002"]},
        ]
        body = "\n".join(json.dumps(line) for line in lines) + "\n"
        r = await seeded.post(
            f"{BASE}/imports", content=body, headers={"content-type": "application/x-ndjson"}
        )
        assert r.status_code == 200, r.text
        assert r.json() | {"revision": 0} == {
            "received": 2,
            "written": 2,
            "created": 1,
            "replaced": 1,
            "skipped": 0,
            "errors": [],
            "revision": 0,
        }
        assert (await seeded.get(f"{BASE}/memories/SMP-0101")).status_code == 200

    async def test_csv_rows_are_stored_with_empty_cells_as_missing(
        self, seeded: httpx.AsyncClient
    ) -> None:
        csv = HEADER + "SMP-0101,Littorina littorea,Maren Holt,SMP-N3,2024-09-03,\n"
        r = await seeded.post(f"{BASE}/imports", content=csv, headers={"content-type": "text/csv"})
        assert r.status_code == 200, r.text
        stored = (await seeded.get(f"{BASE}/memories/SMP-0101")).json()
        assert stored["fields"]["depth_m"] is None

    async def test_bad_row_rejects_the_import_and_writes_nothing(
        self, seeded: httpx.AsyncClient
    ) -> None:
        csv = (
            HEADER
            + "SMP-0101,Littorina littorea,Maren Holt,SMP-N3,2024-09-03,0.8\n"
            + "SMP-0102,Nereis virens,Maren Holt,SMP-N3,2024-09-03,deep\n"
        )
        r = await seeded.post(f"{BASE}/imports", content=csv, headers={"content-type": "text/csv"})
        body = assert_problem(r, 422, "import-rejected")
        assert body["errors"] == [
            {"row": 2, "key": "SMP-0102", "field": "depth_m", "reason": "'deep' is not a number"}
        ]
        assert_problem(await seeded.get(f"{BASE}/memories/SMP-0101"), 404, "memory-not-found")

    async def test_skip_bad_stores_the_good_rows_and_reports_the_bad(
        self, seeded: httpx.AsyncClient
    ) -> None:
        body = (
            json.dumps({"key": "SMP-0101", "fields": PERIWINKLE})
            + "\n{not json\n"
            + json.dumps({"key": "SMP-0103", "fields": {**PERIWINKLE, "depth_m": 900}})
            + "\n"
        )
        r = await seeded.post(
            f"{BASE}/imports",
            params={"skip_bad": "true"},
            content=body,
            headers={"content-type": "application/x-ndjson"},
        )
        assert r.status_code == 200, r.text
        report = r.json()
        assert (report["written"], report["skipped"]) == (1, 2)
        assert [(e["row"], e["field"]) for e in report["errors"]] == [(2, None), (3, "depth_m")]

    async def test_csv_missing_a_column_names_the_column(self, seeded: httpx.AsyncClient) -> None:
        csv = "key,taxon,collector,site_code,collected_on\nSMP-0101,a,b,SMP-N3,2024-09-03\n"
        r = await seeded.post(f"{BASE}/imports", content=csv, headers={"content-type": "text/csv"})
        body = assert_problem(r, 422, "import-rejected")
        assert "'depth_m'" in body["detail"]
        assert body["errors"][0]["field"] == "depth_m"

    async def test_body_over_the_bulk_limit_is_a_413_naming_the_limit(
        self, seeded: httpx.AsyncClient
    ) -> None:
        line = json.dumps({"key": "SMP-0101", "fields": PERIWINKLE}) + "\n"
        big = line * (300 * 1024 // len(line))

        async def chunks() -> object:
            # Streamed without a length, so the route itself has to stop at the cap.
            for i in range(0, len(big), 16 * 1024):
                yield big[i : i + 16 * 1024].encode()

        r = await seeded.post(
            f"{BASE}/imports",
            content=chunks(),  # type: ignore[arg-type]
            headers={"content-type": "application/x-ndjson"},
        )
        body = assert_problem(r, 413, "limit-exceeded")
        assert body["limit"] == "max_bulk_body_bytes"
        assert body["maximum"] == 256 * 1024

    async def test_json_media_type_is_a_415(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(f"{BASE}/imports", json=[{"key": "SMP-0101"}])
        assert_problem(r, 415, "unsupported-media-type")

    async def test_non_utf8_csv_is_a_400(self, seeded: httpx.AsyncClient) -> None:
        csv = (HEADER + "SMP-0101,Littorina,Jos\xe9 Ruiz,SMP-N3,2024-09-03,0.8\n").encode("latin-1")
        r = await seeded.post(f"{BASE}/imports", content=csv, headers={"content-type": "text/csv"})
        assert_problem(r, 400, "malformed-body")

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.post(
            "/v1/collections/smp-nothing/imports",
            content=HEADER,
            headers={"content-type": "text/csv"},
        )
        assert_problem(r, 404, "collection-not-found")
