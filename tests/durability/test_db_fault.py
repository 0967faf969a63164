"""The database goes away and comes back: clear 503s meanwhile, then recovery without a restart.

The machine's PostgreSQL server is shared, so it is never stopped here. The service reaches it
through a small TCP forwarder on 127.0.0.1 that the test starts; cutting the forwarder (closing
its listening socket and every connection through it) is, for the service, the database host
disappearing, and opening it again on the same port is the host coming back.
"""

from __future__ import annotations

import socket
import threading
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy.engine import make_url

from service.api.app import create_app
from service.settings import Settings
from service.storage.migrate import upgrade_to_head

from .conftest import PEPPER, auth_headers

pytestmark = [pytest.mark.anyio, pytest.mark.postgres]

PROBLEM = "application/problem+json"
COLLECTION = "gauges"
BASE = f"/v1/collections/{COLLECTION}"
SPEC: dict[str, Any] = {
    "name": COLLECTION,
    "schema": {"fields": [{"name": "label", "kind": "text", "units": 128}]},
    "rule": "hebbian",
    "verdict_options": {"calibrate": False},
    "seed": 5_150,
}


class Forwarder:
    """A TCP forwarder from a local port to ``target`` that can be cut and restored."""

    def __init__(self, target: tuple[str, int]) -> None:
        self.target = target
        self.port = 0
        self._listener: socket.socket | None = None
        self._sockets: set[socket.socket] = set()
        self._lock = threading.Lock()

    def open(self) -> None:
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(16)
        self.port = listener.getsockname()[1]
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def cut(self) -> None:
        """Refuse new connections and drop every open one, both ways."""
        listener, self._listener = self._listener, None
        if listener is not None:
            # close() alone leaves a listener blocked in accept() listening on Linux;
            # shutdown() wakes the accept and stops the listening for good.
            try:
                listener.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            listener.close()
        with self._lock:
            for sock in self._sockets:
                try:
                    sock.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass
                sock.close()
            self._sockets.clear()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return  # the listener was closed: cut
            try:
                upstream = socket.create_connection(self.target, timeout=5.0)
            except OSError:
                client.close()
                continue
            upstream.settimeout(None)
            with self._lock:
                self._sockets.update((client, upstream))
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    def _pump(self, source: socket.socket, sink: socket.socket) -> None:
        try:
            while chunk := source.recv(65536):
                sink.sendall(chunk)
        except OSError:
            pass
        finally:
            for sock in (source, sink):
                try:
                    sock.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture
def forwarder(postgres_url: str) -> Iterator[Forwarder]:
    url = make_url(postgres_url)
    forwarder = Forwarder((url.host or "127.0.0.1", url.port or 5432))
    forwarder.open()
    yield forwarder
    forwarder.cut()


@pytest.fixture
async def client(
    postgres_url: str, forwarder: Forwarder, tmp_path: Path
) -> AsyncIterator[httpx.AsyncClient]:
    upgrade_to_head(postgres_url)
    headers = auth_headers(tmp_path, postgres_url)
    # The same database (schema included), reached through the forwarder.
    url = make_url(postgres_url).set(host="127.0.0.1", port=forwarder.port)
    options: dict[str, Any] = (
        {"key_pepper": PEPPER} if "key_pepper" in Settings.model_fields else {}
    )
    settings = Settings(
        data_dir=tmp_path, database_url=url.render_as_string(hide_password=False), **options
    )
    app = create_app(settings)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(
            transport=transport, base_url="http://cuebank.test", headers=headers
        ) as c:
            yield c


def assert_unavailable(response: httpx.Response) -> dict[str, Any]:
    assert response.status_code == 503, response.text
    assert response.headers["content-type"] == PROBLEM
    body: dict[str, Any] = response.json()
    assert body["type"] == "/problems/unavailable"
    assert body["status"] == 503
    return body


async def test_unreachable_database_is_a_503_and_the_service_recovers_by_itself(
    client: httpx.AsyncClient, forwarder: Forwarder
) -> None:
    assert (await client.post("/v1/collections", json=SPEC)).status_code == 201
    r = await client.put(f"{BASE}/memories/G-1", json={"fields": {"label": "tyre gauge"}})
    assert r.status_code == 201, r.text
    assert (await client.get("/readyz")).status_code == 200

    forwarder.cut()
    outage = [
        await client.put(f"{BASE}/memories/G-2", json={"fields": {"label": "depth gauge"}}),
        await client.get(f"{BASE}/memories/G-1"),
        await client.post(f"{BASE}/recall", json={"cue": {"label": "tyre gauge"}}),
        await client.get("/v1/collections"),
    ]
    for response in outage:
        body = assert_unavailable(response)
        assert response.headers["retry-after"] == "1"
        # The driver's message names the host; the client gets none of it.
        assert "127.0.0.1" not in body["detail"]
    ready = assert_unavailable(await client.get("/readyz"))
    assert ready["database"] is False
    assert (await client.get("/healthz")).status_code == 200

    forwarder.open()
    # The very first request after the database is back succeeds: the pool checks each
    # connection before use and replaces the ones the outage broke.
    got = await client.get(f"{BASE}/memories/G-1")
    assert got.status_code == 200, got.text
    assert got.json()["fields"] == {"label": "tyre gauge"}
    assert (await client.get("/readyz")).status_code == 200
    # The write refused during the outage was not applied behind the client's back.
    assert (await client.get(f"{BASE}/memories/G-2")).status_code == 404
    r = await client.put(f"{BASE}/memories/G-2", json={"fields": {"label": "depth gauge"}})
    assert r.status_code == 201, r.text
