"""Crash safety on SQLite: a server SIGKILLed in the middle of writes loses nothing it confirmed.

Each cycle starts the server on the same data directory, runs two writer threads against it —
one sending bulk NDJSON imports of fresh keys, one replacing and deleting a small set of keys
one at a time — and kills the process with SIGKILL at a seeded random moment. Before the
restart the file must pass ``PRAGMA integrity_check``; after it, every write that got a 2xx must
be there intact, a write that got no answer must be either wholly there or wholly absent (an
import never half-present), and a full recompile must give the same weights checksum as a
compile, in this process, of exactly the memories the log says the collection holds.
"""

from __future__ import annotations

import json
import random
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.recall.models import CollectionSpec
from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head

from .conftest import ServerProcess, SpawnServer, auth_headers, check, small_spec

pytestmark = pytest.mark.slow

SEED = 20_261_202
CYCLES = 20
#: The kill lands this long after the writers start, uniformly: late enough that a few writes
#: were confirmed, early enough that the whole test stays near a minute.
KILL_AFTER_SECONDS = (0.05, 0.5)
IMPORT_ROWS = (10, 150)
PUT_KEYS = 24
COLLECTION = "bins"
BASE = f"/v1/collections/{COLLECTION}"
SPEC = small_spec(COLLECTION, text="label", category="bin", seed=91_337)
Fields = dict[str, Any]


@dataclass
class Pending:
    """A write sent without a confirmed answer: applied wholly or not at all after the crash."""

    writes: dict[str, Fields | None]  # None: a delete
    kind: str


@dataclass
class Ledger:
    """What the collection must hold: the confirmed state plus the unresolved writes."""

    confirmed: dict[str, Fields] = field(default_factory=dict)
    pending: list[Pending] = field(default_factory=list)
    max_revision: int = 0
    counts: dict[str, int] = field(default_factory=dict)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def confirm(self, writes: dict[str, Fields | None], revision: int) -> None:
        with self.lock:
            self._apply(writes)
            self.max_revision = max(self.max_revision, revision)
            self.counts["confirmed"] = self.counts.get("confirmed", 0) + 1

    def _apply(self, writes: dict[str, Fields | None]) -> None:
        for key, fields in writes.items():
            if fields is None:
                self.confirmed.pop(key, None)
            else:
                self.confirmed[key] = fields

    def resolve(self, stored: dict[str, Fields]) -> None:
        """Settle each unanswered write against what the restarted server holds."""
        for pending in self.pending:
            applied = [stored.get(k) == v for k, v in pending.writes.items()]
            before = [stored.get(k) == self.confirmed.get(k) for k in pending.writes]
            if all(applied):
                self._apply(pending.writes)
                outcome = f"unanswered {pending.kind}, applied"
            elif all(before):
                outcome = f"unanswered {pending.kind}, absent"
            else:
                half = {k: stored.get(k) for k in list(pending.writes)[:5]}
                raise AssertionError(f"an unanswered write is half applied: {half} ...")
            self.counts[outcome] = self.counts.get(outcome, 0) + 1
        self.pending.clear()


def record(key: str, rng: random.Random) -> Fields:
    return {"label": f"crate {key} {rng.randrange(10**6)}", "bin": f"bin-{rng.randrange(12)}"}


def importer(
    client: httpx.Client, ledger: Ledger, cycle: int, rng: random.Random, stop: threading.Event
) -> None:
    batch = 0
    while not stop.is_set():
        keys = [f"imp-{cycle:02d}-{batch:03d}-{i:03d}" for i in range(rng.randint(*IMPORT_ROWS))]
        writes: dict[str, Fields | None] = {k: record(k, rng) for k in keys}
        body = "\n".join(json.dumps({"key": k, "fields": v}) for k, v in writes.items())
        batch += 1
        try:
            r = client.post(
                f"{BASE}/imports", content=body, headers={"content-type": "application/x-ndjson"}
            )
        except httpx.TransportError:
            ledger.pending.append(Pending(writes, "import"))
            return
        ledger.confirm(writes, check(r, 200)["revision"])


def putter(client: httpx.Client, ledger: Ledger, rng: random.Random, stop: threading.Event) -> None:
    while not stop.is_set():
        key = f"put-{rng.randrange(PUT_KEYS):02d}"
        with ledger.lock:
            present = key in ledger.confirmed
        fields = None if present and rng.random() < 0.25 else record(key, rng)
        try:
            if fields is None:
                r = client.delete(f"{BASE}/memories/{key}")
            else:
                r = client.put(f"{BASE}/memories/{key}", json={"fields": fields})
        except httpx.TransportError:
            ledger.pending.append(Pending({key: fields}, "put" if fields else "delete"))
            return
        if fields is None:
            check(r, 204)
            revision = int(r.headers["Cuebank-Revision"])
        else:
            revision = check(r, 200, 201)["revision"]
        ledger.confirm({key: fields}, revision)


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


class Reference:
    """An in-process service on its own database, fed the ledger's memories, to compile them."""

    def __init__(self, data_dir: Path) -> None:
        self.settings = Settings(data_dir=data_dir)
        upgrade_to_head(self.settings.resolved_database_url)
        self.engine = make_engine(self.settings.resolved_database_url)
        self.service = RecallService(self.settings, make_session_factory(self.engine))
        self.service.create_collection(
            DEFAULT_TEAM,
            CollectionSpec(
                name=COLLECTION,
                description="",
                schema=SPEC["schema"],
                rule=SPEC["rule"],
                rule_options={},
                verdict_options=dict(SPEC["verdict_options"]),
                seed=SPEC["seed"],
            ),
        )
        self.held: dict[str, Fields] = {}

    def checksum(self, memories: dict[str, Fields]) -> str:
        for key in set(self.held) - set(memories):
            self.service.delete_memory(DEFAULT_TEAM, COLLECTION, key)
        changed = [(i, k, v) for i, (k, v) in enumerate(memories.items()) if self.held.get(k) != v]
        if changed:
            self.service.import_memories(DEFAULT_TEAM, COLLECTION, changed)
        self.held = dict(memories)
        return self.service.compile(DEFAULT_TEAM, COLLECTION).checksum

    def close(self) -> None:
        self.engine.dispose()


def integrity(path: Path) -> str:
    connection = sqlite3.connect(path)
    try:
        return str(connection.execute("PRAGMA integrity_check").fetchone()[0])
    finally:
        connection.close()


def test_sigkill_during_writes_loses_no_confirmed_write(
    spawn_server: SpawnServer, tmp_path: Path
) -> None:
    rng = random.Random(SEED)
    data_dir = tmp_path / "data"
    upgrade_to_head(Settings(data_dir=data_dir).resolved_database_url)
    database = data_dir / "cuebank.sqlite3"
    headers = auth_headers(data_dir, None)
    reference = Reference(tmp_path / "reference")
    server: ServerProcess = spawn_server(data_dir, None, start=False, warm=True)
    ledger = Ledger()
    try:
        server.start()
        with httpx.Client(base_url=server.url, headers=headers, timeout=30.0) as client:
            check(client.post("/v1/collections", json=SPEC), 201)
            first = {f"seed-{i:02d}": record(f"seed-{i:02d}", rng) for i in range(16)}
            for key, fields in first.items():
                put = check(client.put(f"{BASE}/memories/{key}", json={"fields": fields}), 201)
                ledger.confirm({key: fields}, put["revision"])
        for cycle in range(CYCLES):
            # The next server imports while this one works; it binds the same port after.
            spare: ServerProcess = spawn_server(
                data_dir, None, start=False, warm=True, port=server.port
            )
            spare.launch()
            stop = threading.Event()
            with httpx.Client(base_url=server.url, headers=headers, timeout=30.0) as client:
                threads = [
                    threading.Thread(
                        target=importer,
                        args=(client, ledger, cycle, random.Random(rng.random()), stop),
                    ),
                    threading.Thread(
                        target=putter, args=(client, ledger, random.Random(rng.random()), stop)
                    ),
                ]
                for thread in threads:
                    thread.start()
                time.sleep(rng.uniform(*KILL_AFTER_SECONDS))
                # The flag first, so no writer starts a request after the kill: each thread ends
                # with at most the one write that was in flight when the process died.
                stop.set()
                server.kill()
                for thread in threads:
                    thread.join(timeout=30.0)
                    assert not thread.is_alive()

            assert integrity(database) == "ok", f"cycle {cycle}"
            server = spare
            server.release()
            server.wait_ready()
            with httpx.Client(base_url=server.url, headers=headers, timeout=30.0) as client:
                stored = stored_memories(client)
                ledger.resolve(stored)
                assert stored == ledger.confirmed, f"cycle {cycle}"
                info = check(client.get(BASE), 200)
                assert info["revision"] >= ledger.max_revision
                compiled = check(client.post(f"{BASE}/compile"), 200)
                assert compiled["checksum"] == reference.checksum(ledger.confirmed), (
                    f"cycle {cycle}"
                )
    finally:
        reference.close()
    print(
        f"\ncrash test: {CYCLES} SIGKILLs, {ledger.counts}, {len(ledger.confirmed)} memories "
        f"at the end, revision {ledger.max_revision}"
    )
