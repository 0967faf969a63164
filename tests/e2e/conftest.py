"""A real uvicorn server in a background thread, on a free 127.0.0.1 port.

The server runs the same app factory as ``cuebank serve``, over real sockets, so these tests see
what a client sees: routing, serialisation, the lifespan, and a restart on the same data.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import httpx
import pytest
import uvicorn

from service.settings import Settings


def make_admin_key(data_dir: Path, team: str = "default") -> str:
    """A new admin key of ``team`` (created if missing), straight on the server's database."""
    from service.recall.auth import KeyService, load_pepper
    from service.storage.db import make_engine, make_session_factory

    settings = Settings(data_dir=data_dir)
    engine = make_engine(settings.resolved_database_url)
    try:
        keys = KeyService(settings, make_session_factory(engine), load_pepper(settings))
        keys.ensure_team(team)
        _, secret = keys.create_key(team, ["read", "write", "admin"], label="e2e")
    finally:
        engine.dispose()
    return secret


create_app = pytest.importorskip(
    "service.api.app", reason="the HTTP app factory (service/api/app.py) is not written yet"
).create_app

#: How long a server may take to answer /healthz after its thread starts. Generous: the first
#: start imports the whole app and migrates a fresh database on a possibly busy CI machine.
STARTUP_SECONDS = 30.0


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


class LiveServer:
    """One uvicorn server over a data directory; ``start`` and ``stop`` may be repeated."""

    def __init__(self, data_dir: Path) -> None:
        self.data_dir = data_dir
        self.port = _free_port()
        self._server: uvicorn.Server | None = None
        self._thread: threading.Thread | None = None
        self.key: str | None = None

    @property
    def headers(self) -> dict[str, str]:
        """The Authorization header of an admin key made at the first start."""
        assert self.key is not None, "start the server first"
        return {"Authorization": f"Bearer {self.key}"}

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> None:
        app = create_app(Settings(data_dir=self.data_dir), migrate=True)
        config = uvicorn.Config(
            app, host="127.0.0.1", port=self.port, log_level="warning", lifespan="on"
        )
        server = uvicorn.Server(config)
        # Server.run skips signal handlers outside the main thread, so pytest keeps its own.
        thread = threading.Thread(target=server.run, name=f"uvicorn-{self.port}", daemon=True)
        thread.start()
        self._server, self._thread = server, thread
        deadline = time.monotonic() + STARTUP_SECONDS
        while time.monotonic() < deadline:
            if not thread.is_alive():
                raise RuntimeError(f"the server on port {self.port} stopped during startup")
            try:
                if httpx.get(f"{self.url}/healthz", timeout=1.0).status_code == 200:
                    if self.key is None:
                        self.key = make_admin_key(self.data_dir)
                    return
            except httpx.TransportError:
                pass
            time.sleep(0.05)
        self.stop()
        raise RuntimeError(f"the server on port {self.port} did not answer /healthz in time")

    def stop(self) -> None:
        if self._server is None or self._thread is None:
            return
        self._server.should_exit = True
        self._thread.join(timeout=STARTUP_SECONDS)
        alive = self._thread.is_alive()
        self._server, self._thread = None, None
        if alive:
            raise RuntimeError(f"the server on port {self.port} did not stop")

    def restart(self) -> None:
        """Stop, then start a new app on the same data directory and port."""
        self.stop()
        self.start()


@pytest.fixture
def start_server(tmp_path: Path) -> Iterator[Callable[[], LiveServer]]:
    """Start a live server on a fresh data directory; every server is stopped afterwards."""
    servers: list[LiveServer] = []

    def start() -> LiveServer:
        server = LiveServer(tmp_path / f"data-{len(servers)}")
        servers.append(server)
        server.start()
        return server

    yield start
    for server in servers:
        server.stop()


@pytest.fixture
def live_server(start_server: Callable[[], LiveServer]) -> LiveServer:
    return start_server()


@pytest.fixture
def client(live_server: LiveServer) -> Iterator[httpx.Client]:
    with httpx.Client(base_url=live_server.url, timeout=60.0, headers=live_server.headers) as http:
        yield http
