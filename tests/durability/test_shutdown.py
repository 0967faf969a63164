"""Graceful shutdown: on SIGTERM readiness fails first, and a request in flight still completes.

The in-flight request is an import whose body the test holds back half-sent, so it is certainly
in flight when the signal arrives and still in flight when the server stops accepting
connections; only after that is the rest of the body sent.
"""

from __future__ import annotations

import json
import signal
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import anyio
import httpx
import pytest

from service.api.lifecycle import Lifecycle
from service.settings import Settings
from service.storage.migrate import upgrade_to_head

from .conftest import SpawnServer, auth_headers, check

COLLECTION = "lockers"
BASE = f"/v1/collections/{COLLECTION}"
SPEC: dict[str, Any] = {
    "name": COLLECTION,
    "schema": {"fields": [{"name": "holder", "kind": "text", "units": 128}]},
    "rule": "hebbian",
    "verdict_options": {"calibrate": False},
    "seed": 4_040,
}
DRAIN_SECONDS = 3.0
ROWS = 200


class HeldBody:
    """An NDJSON body sent in two halves, the second only once ``release`` is set."""

    def __init__(self, rows: dict[str, dict[str, Any]]) -> None:
        lines = [json.dumps({"key": k, "fields": v}) + "\n" for k, v in rows.items()]
        half = len(lines) // 2
        self.parts = ["".join(lines[:half]).encode(), "".join(lines[half:]).encode()]
        self.first_sent = threading.Event()
        self.release = threading.Event()

    def __iter__(self) -> Iterator[bytes]:
        yield self.parts[0]
        self.first_sent.set()
        self.release.wait(timeout=30.0)
        yield self.parts[1]


@pytest.mark.slow
def test_sigterm_fails_readiness_then_finishes_the_request_in_flight(
    spawn_server: SpawnServer, tmp_path: Path
) -> None:
    data_dir = tmp_path / "data"
    upgrade_to_head(Settings(data_dir=data_dir).resolved_database_url)
    headers = auth_headers(data_dir, None)
    server = spawn_server(data_dir, None, CUEBANK_SHUTDOWN_DRAIN_SECONDS=str(DRAIN_SECONDS))
    rows = {f"L-{i:03d}": {"holder": f"member {i}"} for i in range(ROWS)}
    body = HeldBody(rows)
    answer: dict[str, httpx.Response] = {}

    def send_import() -> None:
        with httpx.Client(base_url=server.url, headers=headers, timeout=60.0) as client:
            answer["import"] = client.post(
                f"{BASE}/imports", content=body, headers={"content-type": "application/x-ndjson"}
            )

    with httpx.Client(base_url=server.url, headers=headers, timeout=10.0) as client:
        check(client.post("/v1/collections", json=SPEC), 201)
        sender = threading.Thread(target=send_import)
        sender.start()
        assert body.first_sent.wait(timeout=10.0)
        time.sleep(0.3)  # the server has the request's head by now and is reading its body
        signalled = time.monotonic()
        server.terminate()

        # Draining: readiness fails at once, everything else is still served.
        ready = client.get("/readyz", headers={"connection": "close"})
        assert time.monotonic() - signalled < DRAIN_SECONDS, "too slow to observe the drain"
        assert ready.status_code == 503
        assert ready.json()["type"] == "/problems/unavailable"
        assert ready.json()["shutting_down"] is True
        assert client.get("/healthz").status_code == 200
        assert check(client.get(BASE), 200)["name"] == COLLECTION

    # After the drain the server stops accepting connections but waits for the import.
    deadline = signalled + DRAIN_SECONDS + 10.0
    while time.monotonic() < deadline:
        try:
            httpx.get(f"{server.url}/healthz", timeout=1.0)
        except httpx.TransportError:
            break
        time.sleep(0.05)
    else:
        pytest.fail("the server kept accepting connections after the drain")
    assert server.proc is not None
    assert server.proc.poll() is None, "the server exited with the import still in flight"
    body.release.set()
    sender.join(timeout=30.0)
    report = check(answer["import"], 200)
    assert report["written"] == ROWS
    # uvicorn re-raises the signal once it has shut down cleanly.
    assert server.wait(timeout=30.0) in (0, -signal.SIGTERM)

    server.start()
    with httpx.Client(base_url=server.url, headers=headers, timeout=10.0) as client:
        page = check(client.get(f"{BASE}/memories", params={"limit": 500}), 200)
        assert {m["key"]: m["fields"] for m in page["items"]} == rows


class TestLifecycle:
    """The signal hook itself, with a recording handler in uvicorn's place."""

    @pytest.fixture
    def anyio_backend(self) -> str:
        return "asyncio"

    @pytest.fixture
    def handed_on(self) -> Iterator[list[int]]:
        calls: list[int] = []
        original = signal.signal(signal.SIGTERM, lambda signum, _frame: calls.append(signum))
        yield calls
        signal.signal(signal.SIGTERM, original)

    @pytest.mark.anyio
    async def test_signal_drains_first_and_is_handed_on_after_the_drain(
        self, handed_on: list[int]
    ) -> None:
        lifecycle = Lifecycle(drain_seconds=0.2)
        lifecycle.install()
        signal.raise_signal(signal.SIGTERM)
        await anyio.sleep(0.05)
        assert lifecycle.draining
        assert handed_on == []
        await anyio.sleep(0.4)
        assert handed_on == [signal.SIGTERM]
        lifecycle.shut_down()

    @pytest.mark.anyio
    async def test_second_signal_is_handed_on_at_once_and_only_once(
        self, handed_on: list[int]
    ) -> None:
        lifecycle = Lifecycle(drain_seconds=0.2)
        lifecycle.install()
        signal.raise_signal(signal.SIGTERM)
        await anyio.sleep(0.01)
        signal.raise_signal(signal.SIGTERM)
        await anyio.sleep(0.01)
        assert handed_on == [signal.SIGTERM]
        await anyio.sleep(0.4)
        assert handed_on == [signal.SIGTERM]
        lifecycle.shut_down()

    @pytest.mark.anyio
    async def test_shutdown_drains_and_gives_the_signal_back(self, handed_on: list[int]) -> None:
        before = signal.getsignal(signal.SIGTERM)
        lifecycle = Lifecycle()
        lifecycle.install()
        assert signal.getsignal(signal.SIGTERM) != before
        lifecycle.shut_down()
        assert lifecycle.draining
        assert signal.getsignal(signal.SIGTERM) == before
