"""Hostile inputs: each gets a clear 4xx (or, for keys that only look dangerous, is stored as the
plain data it is), the service keeps answering, and the database file stays sound."""

from __future__ import annotations

import json
import sqlite3
from collections.abc import AsyncIterator
from pathlib import Path
from urllib.parse import quote

import httpx
import pytest

from .conftest import BASE, CSV, CUE, FIELDS, JSON, NDJSON, SEED, Make, assert_problem

pytestmark = pytest.mark.anyio

MIB = 1024 * 1024


@pytest.fixture
async def hostile(make_client: Make) -> AsyncIterator[httpx.AsyncClient]:
    """A seeded service; after the test it must still answer and its database be intact."""
    client: httpx.AsyncClient = await make_client()
    assert (await client.post("/v1/collections", json=SEED["collection"])).status_code == 201
    rows = "".join(json.dumps({"key": k, "fields": f}) + "\n" for k, f in SEED["memories"].items())
    r = await client.post(f"{BASE}/imports", content=rows, headers=NDJSON)
    assert r.status_code == 200, r.text
    yield client
    assert (await client.get("/healthz")).status_code == 200
    r = await client.post(f"{BASE}/recall", json={"cue": CUE})
    assert r.status_code == 200, r.text
    assert r.json()["verdict"] in ("recalled", "spurious", "unsettled")
    page = (await client.get(f"{BASE}/memories", params={"limit": 500})).json()
    assert {m["key"] for m in page["items"]} >= set(SEED["memories"])
    data_dir: Path = client.app.state.settings.data_dir  # type: ignore[attr-defined]
    with sqlite3.connect(data_dir / "cuebank.sqlite3") as db:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]


class Stream:
    """A request body of ``total`` bytes sent in chunks, counting how many were pulled."""

    def __init__(self, total: int, chunk: int = 64 * 1024) -> None:
        self.total = total
        self.chunk = chunk
        self.pulled = 0

    async def __aiter__(self) -> AsyncIterator[bytes]:
        sent = 0
        while sent < self.total:
            self.pulled += self.chunk
            sent += self.chunk
            yield b" " * self.chunk


class TestNesting:
    async def test_deeply_nested_json_is_refused_before_parsing(
        self, hostile: httpx.AsyncClient
    ) -> None:
        body = b'{"cue": ' + b"[" * 30_000 + b"]" * 30_000 + b"}"
        r = await hostile.post(f"{BASE}/recall", content=body, headers=JSON)
        body_ = assert_problem(r, 422, "limit-exceeded")
        assert body_["limit"] == "max_json_depth"

    async def test_deeply_nested_objects_too(self, hostile: httpx.AsyncClient) -> None:
        body = b'{"a":' * 10_000 + b"1" + b"}" * 10_000
        r = await hostile.put(f"{BASE}/memories/SMP-0100", content=body, headers=JSON)
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "max_json_depth"

    async def test_brackets_inside_strings_are_not_nesting(
        self, hostile: httpx.AsyncClient
    ) -> None:
        r = await hostile.post(f"{BASE}/recall", json={"cue": {"taxon": "[[[[{{{{" * 200}})
        assert r.status_code in (200, 422), r.text
        if r.status_code == 422:
            assert r.json().get("limit") != "max_json_depth"

    async def test_a_deeply_nested_import_line_is_a_bad_row(
        self, hostile: httpx.AsyncClient
    ) -> None:
        line = b'{"key": "SMP-0100", "fields": ' + b"[" * 50_000 + b"]" * 50_000 + b"}\n"
        r = await hostile.post(f"{BASE}/imports", content=line, headers=NDJSON)
        body = assert_problem(r, 422, "import-rejected")
        assert "nested too deep" in body["errors"][0]["reason"]


class TestHugeBodies:
    async def test_a_100_mb_body_is_refused_at_the_cap_without_reading_it_all(
        self, hostile: httpx.AsyncClient
    ) -> None:
        stream = Stream(100 * MIB)
        r = await hostile.post(f"{BASE}/recall", content=stream, headers=JSON)
        assert assert_problem(r, 413, "limit-exceeded")["limit"] == "max_body_bytes"
        assert stream.pulled <= 2 * 64 * 1024 + 64 * 1024  # the 64 KiB cap and a chunk

    async def test_a_100_mb_import_is_refused_at_the_bulk_cap(
        self, hostile: httpx.AsyncClient
    ) -> None:
        stream = Stream(100 * MIB)
        r = await hostile.post(f"{BASE}/imports", content=stream, headers=NDJSON)
        assert assert_problem(r, 413, "limit-exceeded")["limit"] == "max_bulk_body_bytes"
        assert stream.pulled <= 256 * 1024 + 64 * 1024

    async def test_a_declared_100_mb_body_is_refused_before_reading(
        self, hostile: httpx.AsyncClient
    ) -> None:
        stream = Stream(100 * MIB)
        headers = {**JSON, "Content-Length": str(100 * MIB)}
        r = await hostile.post(f"{BASE}/recall", content=stream, headers=headers)
        assert_problem(r, 413, "limit-exceeded")
        assert stream.pulled <= 64 * 1024

    async def test_a_million_element_cue_array_is_refused(self, hostile: httpx.AsyncClient) -> None:
        body = b'{"cues": [' + b",".join([b"{}"] * 1_000_000) + b"]}"
        r = await hostile.post(f"{BASE}/recall:batch", content=body, headers=JSON)
        assert_problem(r, 413, "limit-exceeded")

    async def test_a_cue_array_under_the_body_cap_meets_max_batch(
        self, hostile: httpx.AsyncClient
    ) -> None:
        body = b'{"cues": [' + b",".join([b"{}"] * 20_000) + b"]}"
        r = await hostile.post(f"{BASE}/recall:batch", content=body, headers=JSON)
        assert assert_problem(r, 413, "limit-exceeded")["limit"] == "max_batch"

    async def test_a_cue_with_ten_thousand_fields_is_refused(
        self, hostile: httpx.AsyncClient
    ) -> None:
        cue = {f"f{i}": "x" for i in range(5_000)}
        r = await hostile.post(f"{BASE}/recall", json={"cue": cue})
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "max_fields"


class TestNumbers:
    @pytest.mark.parametrize("number", ["NaN", "Infinity", "-Infinity", "1e999", "-1e400"])
    async def test_non_finite_numbers_are_malformed_json(
        self, hostile: httpx.AsyncClient, number: str
    ) -> None:
        body = f'{{"fields": {{"taxon": "x", "depth_m": {number}}}}}'.encode()
        r = await hostile.put(f"{BASE}/memories/SMP-0100", content=body, headers=JSON)
        assert_problem(r, 400, "malformed-json")
        r = await hostile.post(f"{BASE}/recall", content=f'{{"cue": {{"depth_m": {number}}}}}',
                               headers=JSON)  # fmt: skip
        assert_problem(r, 400, "malformed-json")

    async def test_a_five_thousand_digit_integer_is_malformed_json(
        self, hostile: httpx.AsyncClient
    ) -> None:
        r = await hostile.post(f"{BASE}/recall", content='{"cue": {"depth_m": ' + "9" * 5000 + "}}",
                               headers=JSON)  # fmt: skip
        assert_problem(r, 400, "malformed-json")

    async def test_a_huge_but_finite_number_is_out_of_range(
        self, hostile: httpx.AsyncClient
    ) -> None:
        r = await hostile.put(f"{BASE}/memories/SMP-0100",
                              json={"fields": {**FIELDS, "depth_m": 10**300}})  # fmt: skip
        assert r.status_code == 422, r.text

    async def test_non_finite_numbers_in_an_import_line_are_bad_rows(
        self, hostile: httpx.AsyncClient
    ) -> None:
        line = b'{"key": "SMP-0100", "fields": {"depth_m": NaN}}\n'
        r = await hostile.post(f"{BASE}/imports", content=line, headers=NDJSON)
        assert_problem(r, 422, "import-rejected")


class TestText:
    async def test_invalid_utf8_is_a_malformed_body(self, hostile: httpx.AsyncClient) -> None:
        r = await hostile.post(f"{BASE}/recall", content=b'{"cue": {"taxon": "\xff\xfe"}}',
                               headers=JSON)  # fmt: skip
        assert "0xff" in assert_problem(r, 400, "malformed-body")["detail"]
        r = await hostile.post(f"{BASE}/imports", content=b"key,taxon\n\xc3\x28,x\n",
                               headers=CSV)  # fmt: skip
        assert_problem(r, 400, "malformed-body")

    @pytest.mark.parametrize("char", ["\x00", "\x07", "\x1b", "\x7f"], ids=repr)
    async def test_control_characters_in_keys_are_refused(
        self, hostile: httpx.AsyncClient, char: str
    ) -> None:
        r = await hostile.put(f"{BASE}/memories/SMP{quote(char)}0100", json={"fields": FIELDS})
        assert_problem(r, 422, "invalid-record")

    @pytest.mark.parametrize("char", ["\x00", "\x07", "\x1b", "\x7f"], ids=repr)
    async def test_control_characters_in_values_are_refused(
        self, hostile: httpx.AsyncClient, char: str
    ) -> None:
        fields = {**FIELDS, "collector": f"Maren{char}Holt"}
        r = await hostile.put(f"{BASE}/memories/SMP-0100", json={"fields": fields})
        assert assert_problem(r, 422, "invalid-record")["field"] == "collector"

    async def test_line_breaks_and_tabs_in_values_are_kept(
        self, hostile: httpx.AsyncClient
    ) -> None:
        fields = {**FIELDS, "collector": "Maren\tHolt"}
        r = await hostile.put(f"{BASE}/memories/SMP-0100", json={"fields": fields})
        assert r.status_code == 201, r.text

    async def test_very_long_keys_and_values_are_refused(self, hostile: httpx.AsyncClient) -> None:
        r = await hostile.put(f"{BASE}/memories/{'K' * 20_000}", json={"fields": FIELDS})
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "key_length"
        r = await hostile.put(f"{BASE}/memories/SMP-0100",
                              json={"fields": {**FIELDS, "taxon": "T" * 60_000}})  # fmt: skip
        assert r.status_code == 422, r.text
        r = await hostile.post(f"{BASE}/recall", json={"cue": {"taxon": "T" * 60_000}})
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "max_text_length"


class TestLookalikes:
    @pytest.mark.parametrize(
        "key",
        [
            "'; DROP TABLE memories; --",
            "1 OR 1=1",
            '" UNION SELECT secret_hash FROM api_keys --',
            "../../../../etc/passwd",
            "..\\..\\windows\\system32",
            "%2e%2e%2f%2e%2e%2f",
            "${jndi:ldap://x}",
        ],
    )
    async def test_sql_or_path_looking_keys_are_only_data(
        self, hostile: httpx.AsyncClient, key: str
    ) -> None:
        # They are valid keys: stored and read back byte for byte, never interpreted.
        path = f"{BASE}/memories/{quote(key, safe='')}"
        r = await hostile.put(path, json={"fields": FIELDS})
        assert r.status_code == 201, r.text
        assert r.json()["key"] == key
        got = await hostile.get(path)
        assert got.json()["key"] == key
        assert (await hostile.delete(path)).status_code == 204

    @pytest.mark.parametrize("name", ["x'; DROP TABLE teams; --", "../etc", "A" * 65])
    async def test_sql_or_path_looking_collection_names_are_refused(
        self, hostile: httpx.AsyncClient, name: str
    ) -> None:
        r = await hostile.post("/v1/collections", json={**SEED["collection"], "name": name})
        assert_problem(r, 422, "invalid-request")


class TestDuplicates:
    async def test_duplicate_json_members_are_malformed(self, hostile: httpx.AsyncClient) -> None:
        body = b'{"cue": {"taxon": "Spartina"}, "cue": {"taxon": "Littorina"}}'
        r = await hostile.post(f"{BASE}/recall", content=body, headers=JSON)
        assert "'cue' appears twice" in assert_problem(r, 400, "malformed-json")["detail"]

    async def test_nested_duplicates_too(self, hostile: httpx.AsyncClient) -> None:
        body = b'{"fields": {"taxon": "a", "taxon": "b"}}'
        r = await hostile.put(f"{BASE}/memories/SMP-0100", content=body, headers=JSON)
        assert_problem(r, 400, "malformed-json")

    async def test_duplicates_in_an_import_line_are_a_bad_row(
        self, hostile: httpx.AsyncClient
    ) -> None:
        line = b'{"key": "SMP-0100", "key": "SMP-0101", "fields": {}}\n'
        r = await hostile.post(f"{BASE}/imports", content=line, headers=NDJSON)
        assert "appears twice" in assert_problem(r, 422, "import-rejected")["errors"][0]["reason"]


class TestCsvBombs:
    async def test_a_header_with_fifty_thousand_columns(self, hostile: httpx.AsyncClient) -> None:
        header = ",".join(["key"] + [f"c{i}" for i in range(50_000)])[: 250 * 1024]
        r = await hostile.post(f"{BASE}/imports", content=header + "\n", headers=CSV)
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "max_fields"

    async def test_one_huge_line(self, make_client: Make) -> None:
        client: httpx.AsyncClient = await make_client(max_import_line_bytes=64 * 1024)
        assert (await client.post("/v1/collections", json=SEED["collection"])).status_code == 201
        body = "key,taxon\n" + "SMP-1," + "x" * 200_000 + "\n"
        r = await client.post(f"{BASE}/imports", content=body, headers=CSV)
        assert assert_problem(r, 422, "limit-exceeded")["limit"] == "max_import_line_bytes"

    async def test_a_cell_past_the_csv_field_limit_is_a_bad_row(
        self, hostile: httpx.AsyncClient
    ) -> None:
        header = "key,taxon,collector,site_code,collected_on,depth_m\n"
        body = header + 'SMP-1,"' + "x" * 140_000 + '",a,b,2024-01-01,1\n'
        r = await hostile.post(f"{BASE}/imports", content=body, headers=CSV)
        assert r.status_code == 422, r.text

    async def test_many_short_columns_in_rows(self, hostile: httpx.AsyncClient) -> None:
        header = "key,taxon,collector,site_code,collected_on,depth_m\n"
        rows = "".join("SMP-9," + ",".join(["x"] * 2000) + "\n" for _ in range(50))
        r = await hostile.post(f"{BASE}/imports", content=header + rows, headers=CSV)
        body = assert_problem(r, 422, "import-rejected")
        assert body["errors"][0]["reason"] == "the row has 2001 cells, the header has 6"


class TestOtherShapes:
    @pytest.mark.parametrize(
        "body",
        [b"", b"null", b"[]", b'"cue"', b"{", b'{"cue": }', b"\xef\xbb\xbf{}", b"{}" * 1000],
        ids=repr,
    )
    async def test_odd_bodies_get_a_4xx(self, hostile: httpx.AsyncClient, body: bytes) -> None:
        r = await hostile.post(f"{BASE}/recall", content=body, headers=JSON)
        assert 400 <= r.status_code < 500, r.text
        assert r.headers["content-type"] == "application/problem+json"

    async def test_a_huge_authorization_header_is_a_401(self, hostile: httpx.AsyncClient) -> None:
        r = await hostile.get(
            "/v1/collections", headers={"Authorization": "Bearer " + "a" * 60_000}
        )
        assert_problem(r, 401, "unauthenticated")

    async def test_a_json_payload_in_the_wrong_media_type(self, hostile: httpx.AsyncClient) -> None:
        r = await hostile.post(f"{BASE}/imports", content=json.dumps({"a": 1}),
                               headers={"Content-Type": "application/xml"})  # fmt: skip
        assert_problem(r, 415, "unsupported-media-type")
