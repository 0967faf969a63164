"""Two workers, one database: a write through one is seen by the very next request to the other.

Each worker keeps its own cache of compiled memories; what keeps them honest is the revision
check before every recall. The test warms the reading worker's cache first, so a stale cache
would answer from the old memories and the check is what the test exercises.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import httpx
import pytest

from .conftest import SpawnServer, auth_headers, check, small_spec

pytestmark = pytest.mark.slow

COLLECTION = "parts"
BASE = f"/v1/collections/{COLLECTION}"
SPEC = small_spec(COLLECTION, text="part", category="bin", seed=77_001)
# An invented workshop's parts store: distinct names, so each cue has one clear answer.
PARTS = {
    "P-100": {"part": "brass hinge", "bin": "A1"},
    "P-101": {"part": "oak dowel", "bin": "A2"},
    "P-102": {"part": "steel washer", "bin": "B1"},
    "P-103": {"part": "rubber grommet", "bin": "B2"},
    "P-104": {"part": "copper rivet", "bin": "C1"},
}
NEW_PARTS = {
    "P-200": {"part": "nylon spacer", "bin": "D4"},
    "P-201": {"part": "felt pad", "bin": "E5"},
    "P-202": {"part": "cork stopper", "bin": "F6"},
}


def recall(client: httpx.Client, part: str) -> dict[str, Any]:
    body: dict[str, Any] = check(
        client.post(f"{BASE}/recall", json={"cue": {"part": part}, "options": {"top_k": 3}}), 200
    )
    return body


def nearest_keys(answer: dict[str, Any]) -> list[str]:
    return [n["key"] for n in answer["nearest"]]


def test_writes_through_one_worker_are_seen_by_the_next_request_to_the_other(
    migrated_url: str | None, spawn_server: SpawnServer, tmp_path: Path
) -> None:
    # The database fixture first: fixtures end in reverse order, so the servers stop before
    # their PostgreSQL schema is dropped.
    data_dir = tmp_path / "data"
    headers = auth_headers(data_dir, migrated_url)
    one = spawn_server(data_dir, migrated_url, start=False)
    two = spawn_server(data_dir, migrated_url, start=False)
    for server in (one, two):
        server.launch()
    for server in (one, two):
        server.wait_ready()
    with (
        httpx.Client(base_url=one.url, headers=headers, timeout=30.0) as a,
        httpx.Client(base_url=two.url, headers=headers, timeout=30.0) as b,
    ):
        check(a.post("/v1/collections", json=SPEC), 201)
        for key, fields in PARTS.items():
            check(a.put(f"{BASE}/memories/{key}", json={"fields": fields}), 201)
        # Both caches now hold a compiled memory of this revision.
        for client in (a, b):
            assert recall(client, "brass hinge")["best_key"] == "P-100"

        writers_readers = [(a, b), (b, a), (a, b)]
        for (writer, reader), (key, fields) in zip(writers_readers, NEW_PARTS.items(), strict=True):
            put = check(writer.put(f"{BASE}/memories/{key}", json={"fields": fields}), 201)
            answer = recall(reader, fields["part"])
            assert answer["revision"] == put["revision"]
            assert answer["best_key"] == key
            assert check(reader.get(f"{BASE}/memories/{key}"), 200)["fields"] == fields

            deleted = writer.delete(f"{BASE}/memories/{key}")
            check(deleted, 204)
            answer = recall(reader, fields["part"])
            assert answer["revision"] == int(deleted.headers["Cuebank-Revision"])
            assert key not in nearest_keys(answer)
            check(reader.get(f"{BASE}/memories/{key}"), 404)

        # A replaced memory: the reader answers with the new fields, not its cached ones.
        replaced = {"part": "brass hinge", "bin": "Z9"}
        put = check(b.put(f"{BASE}/memories/P-100", json={"fields": replaced}), 200)
        answer = recall(a, "brass hinge")
        assert answer["revision"] == put["revision"]
        assert answer["fields"]["bin"]["value"] == "Z9"
