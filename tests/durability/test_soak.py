"""Concurrency soak: eight clients mix writes and recalls against a live server, on each database.

Every key belongs to one client, and each client sends one request at a time, so the client's
own log of acknowledged operations, applied in order, is exactly what its keys must hold at the
end: a lost or misapplied update shows as a difference. Each client also checks that the
revisions it sees never go back (reads) and always go up (its writes).
"""

from __future__ import annotations

import json
import random
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest

from .conftest import SpawnServer, auth_headers, check, small_spec

pytestmark = pytest.mark.slow

#: How long the clients run on each database. The issue asks for at least 30 s.
DURATION_SECONDS = 30.0
CLIENTS = 8
#: A bound on each client's requests, so a fast machine does not turn the soak into a flood.
MAX_REQUESTS_PER_CLIENT = 3000
KEYS_PER_CLIENT = 12
SEED = 8_808
COLLECTION = "soak"
BASE = f"/v1/collections/{COLLECTION}"
SPEC = small_spec(COLLECTION, text="label", category="shelf", seed=31_337)
ANCHOR = {"label": "anchor record, never changed", "shelf": "S0"}
Fields = dict[str, Any]


@dataclass
class ClientLog:
    """One client's view: its keys' expected state, what it saw, and what went wrong."""

    index: int
    expected: dict[str, Fields] = field(default_factory=dict)
    last_write_revision: int = 0
    last_seen_revision: int = 0
    operations: Counter[str] = field(default_factory=Counter)
    statuses: Counter[int] = field(default_factory=Counter)
    problems: list[str] = field(default_factory=list)

    def saw(self, op: str, response: httpx.Response, revision: int | None, write: bool) -> None:
        self.operations[op] += 1
        self.statuses[response.status_code] += 1
        if revision is None:
            return
        if write and revision <= self.last_write_revision:
            self.problems.append(f"{op}: revision {revision} after {self.last_write_revision}")
        if revision < self.last_seen_revision:
            self.problems.append(
                f"{op}: revision {revision} went back from {self.last_seen_revision}"
            )
        self.last_seen_revision = max(self.last_seen_revision, revision)
        if write:
            self.last_write_revision = revision


def run_client(url: str, headers: dict[str, str], log: ClientLog, deadline: float) -> None:
    rng = random.Random(SEED * 100 + log.index)
    keys = [f"c{log.index}-k{j:02d}" for j in range(KEYS_PER_CLIENT)]
    counter = 0

    def fields_for(key: str) -> Fields:
        nonlocal counter
        counter += 1
        return {"label": f"{key} version {counter}", "shelf": f"S{rng.randrange(1, 9)}"}

    with httpx.Client(base_url=url, headers=headers, timeout=60.0) as client:
        for _ in range(MAX_REQUESTS_PER_CLIENT):
            if time.monotonic() >= deadline or len(log.problems) > 20:
                return
            roll = rng.random()
            key = rng.choice(keys)
            if roll < 0.35:
                fields = fields_for(key)
                r = client.put(f"{BASE}/memories/{key}", json={"fields": fields})
                expected = 200 if key in log.expected else 201
                if r.status_code == expected:
                    log.expected[key] = fields
                    log.saw("put", r, r.json()["revision"], write=True)
                else:
                    log.saw("put", r, None, write=True)
                    log.problems.append(f"put {key}: {r.status_code} {r.text[:200]}")
            elif roll < 0.50:
                if key not in log.expected:
                    continue
                r = client.delete(f"{BASE}/memories/{key}")
                if r.status_code == 204:
                    del log.expected[key]
                    log.saw("delete", r, int(r.headers["Cuebank-Revision"]), write=True)
                else:
                    log.saw("delete", r, None, write=True)
                    log.problems.append(f"delete {key}: {r.status_code} {r.text[:200]}")
            elif roll < 0.65:
                batch = {k: fields_for(k) for k in rng.sample(keys, rng.randint(2, 6))}
                body = "\n".join(json.dumps({"key": k, "fields": v}) for k, v in batch.items())
                r = client.post(
                    f"{BASE}/imports",
                    content=body,
                    headers={"content-type": "application/x-ndjson"},
                )
                if r.status_code == 200:
                    log.expected.update(batch)
                    log.saw("import", r, r.json()["revision"], write=True)
                else:
                    log.saw("import", r, None, write=True)
                    log.problems.append(f"import: {r.status_code} {r.text[:200]}")
            else:
                own = log.expected.get(key)
                cue = {"label": own["label"]} if own else {"label": ANCHOR["label"]}
                r = client.post(f"{BASE}/recall", json={"cue": cue, "options": {"top_k": 3}})
                if r.status_code != 200:
                    log.saw("recall", r, None, write=False)
                    log.problems.append(f"recall: {r.status_code} {r.text[:200]}")
                    continue
                # Read-your-writes: an answer from a revision older than this client's last
                # write would go back, which saw() reports. Which memory the cue lands on is
                # not checked: the collection runs far past the Hebbian rule's capacity.
                log.saw("recall", r, r.json()["revision"], write=False)


def stored_memories(client: httpx.Client) -> dict[str, Fields]:
    out: dict[str, Fields] = {}
    cursor: str | None = None
    while True:
        params: dict[str, Any] = {"limit": 500}
        if cursor:
            params["cursor"] = cursor
        page = check(client.get(f"{BASE}/memories", params=params), 200)
        out.update({m["key"]: m["fields"] for m in page["items"]})
        cursor = page.get("next_cursor")
        if not cursor:
            return out


def test_eight_clients_lose_no_update_and_never_see_a_5xx(
    migrated_url: str | None, spawn_server: SpawnServer, tmp_path: Path
) -> None:
    # The database fixture first: fixtures end in reverse order, so the servers stop before
    # their PostgreSQL schema is dropped.
    data_dir = tmp_path / "data"
    headers = auth_headers(data_dir, migrated_url)
    server = spawn_server(data_dir, migrated_url)
    with httpx.Client(base_url=server.url, headers=headers, timeout=30.0) as client:
        check(client.post("/v1/collections", json=SPEC), 201)
        # Recalls need a memory to settle on even while every client's keys are deleted.
        check(client.put(f"{BASE}/memories/anchor", json={"fields": ANCHOR}), 201)

    logs = [ClientLog(i) for i in range(CLIENTS)]
    deadline = time.monotonic() + DURATION_SECONDS
    threads = [
        threading.Thread(target=run_client, args=(server.url, headers, log, deadline))
        for log in logs
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=DURATION_SECONDS + 120.0)
        assert not thread.is_alive()

    statuses = sum((log.statuses for log in logs), Counter[int]())
    operations = sum((log.operations for log in logs), Counter[str]())
    backend = "postgresql" if migrated_url else "sqlite"
    print(f"\nsoak ({backend}): {dict(operations)} {dict(statuses)}")
    assert not [s for s in statuses if s >= 500], statuses
    assert [p for log in logs for p in log.problems] == []

    with httpx.Client(base_url=server.url, headers=headers, timeout=30.0) as client:
        stored = stored_memories(client)
    expected = {"anchor": ANCHOR}
    for log in logs:
        expected.update(log.expected)
    assert stored == expected
