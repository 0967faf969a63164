"""Real server processes for the durability tests: started, killed, restarted, shared.

Each server is ``python -m service.cli serve`` in a subprocess on a free 127.0.0.1 port, built
from ``CUEBANK_*`` variables exactly as a deployment builds it, so SIGKILL and SIGTERM hit a real
process and two servers are two workers with nothing shared but the database.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import IO, Any

import httpx
import pytest

from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head

REPO = Path(__file__).resolve().parents[2]
#: How long a server may take to answer /healthz: a cold start imports numpy, SQLAlchemy and
#: FastAPI, seconds on a busy CI machine.
STARTUP_SECONDS = 30.0
#: A fixed pepper, so servers over one PostgreSQL database accept each other's keys.
PEPPER = "durability-tests-pepper-0123456789abcdef"
TEAM = "durability"
#: A server that imports everything first, then waits for a line on stdin before it runs
#: ``cuebank serve``: a restart then costs the startup, not the seconds of imports. Importing
#: touches no database, so the process still starts from nothing where it matters.
WARM_START = (
    "import sys, service.cli, service.api.app; sys.stdin.readline(); "
    "sys.exit(service.cli.main(sys.argv[1:]))"
)


def small_spec(name: str, *, text: str, category: str, seed: int) -> dict[str, Any]:
    """A collection the durability tests can fill and compile fast: one text and one category
    field, the Hebbian rule, thresholds left uncalibrated."""
    return {
        "name": name,
        "schema": {
            "fields": [
                {"name": text, "kind": "text", "units": 256},
                {"name": category, "kind": "category", "units": 64},
            ]
        },
        "rule": "hebbian",
        "verdict_options": {"calibrate": False},
        "seed": seed,
    }


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


def server_env(data_dir: Path, database_url: str | None, **extra: str) -> dict[str, str]:
    """The environment of a server process: only what the test chooses, plus PATH and HOME."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("CUEBANK_")}
    env.update(
        {
            "CUEBANK_DATA_DIR": str(data_dir),
            "CUEBANK_LOG_LEVEL": "WARNING",
            "CUEBANK_KEY_PEPPER": PEPPER,
            # The soak test's eight clients share one key; the abuse limits are not under test.
            "CUEBANK_RATE_PER_SECOND": "100000",
            "CUEBANK_BURST": "100000",
            "OPENBLAS_NUM_THREADS": "1",
            "PYTHONUNBUFFERED": "1",
        }
    )
    if database_url is not None:
        env["CUEBANK_DATABASE_URL"] = database_url
    env.update(extra)
    return env


def auth_headers(data_dir: Path, database_url: str | None) -> dict[str, str]:
    """A key with every scope, made the way an operator would before the first request.

    Empty while the service has no API keys yet; a header nobody checks does no harm.
    """
    try:
        from service.recall.auth import KeyService, load_pepper
    except ImportError:
        return {}
    settings = Settings(data_dir=data_dir, database_url=database_url, key_pepper=PEPPER)
    engine = make_engine(settings.resolved_database_url)
    try:
        keys = KeyService(settings, make_session_factory(engine), load_pepper(settings))
        keys.ensure_team(TEAM)
        _, secret = keys.create_key(TEAM, ["read", "write", "admin"], label="durability tests")
    finally:
        engine.dispose()
    return {"Authorization": f"Bearer {secret}"}


class ServerProcess:
    """One ``cuebank serve`` process over a database; may be killed and started again."""

    def __init__(
        self,
        data_dir: Path,
        database_url: str | None,
        log: Path,
        *,
        port: int | None = None,
        warm: bool = False,
        args: Sequence[str] = (),
        **env: str,
    ) -> None:
        self.data_dir = data_dir
        self.database_url = database_url
        self.port = port or free_port()
        self.warm = warm
        self.args = tuple(args)
        self.env = server_env(data_dir, database_url, **env)
        self.log = log
        self.proc: subprocess.Popen[bytes] | None = None
        self._log_file: IO[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> None:
        self.launch()
        self.release()
        self.wait_ready()

    def launch(self) -> None:
        """Start the process without waiting for it to serve (a warm one waits for release)."""
        self._log_file = self.log.open("ab")
        python = [sys.executable, "-c", WARM_START] if self.warm else [sys.executable, "-m"]
        command = [*python, *([] if self.warm else ["service.cli"]), "serve"]
        self.proc = subprocess.Popen(
            [*command, "--host", "127.0.0.1", "--port", str(self.port), *self.args],
            cwd=REPO,
            env=self.env,
            stdin=subprocess.PIPE if self.warm else subprocess.DEVNULL,
            stdout=self._log_file,
            stderr=subprocess.STDOUT,
        )

    def release(self) -> None:
        """Let a warm process go on to serve."""
        if self.warm and self.proc is not None and self.proc.stdin is not None:
            self.proc.stdin.write(b"go\n")
            self.proc.stdin.close()

    def wait_ready(self) -> None:
        assert self.proc is not None
        deadline = time.monotonic() + STARTUP_SECONDS
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the server exited during startup; log:\n{self.log_text()}")
            try:
                if httpx.get(f"{self.url}/healthz", timeout=1.0).status_code == 200:
                    return
            except httpx.TransportError:
                pass
            time.sleep(0.05)
        self.kill()
        raise RuntimeError(f"the server did not answer /healthz in time; log:\n{self.log_text()}")

    def log_text(self) -> str:
        return self.log.read_text(encoding="utf-8", errors="replace")[-4000:]

    def kill(self) -> None:
        """SIGKILL: no shutdown code runs, as in a crash or an OOM kill."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
        self._reap()

    def terminate(self) -> None:
        """SIGTERM, as a process supervisor stops a worker; does not wait."""
        assert self.proc is not None
        self.proc.send_signal(signal.SIGTERM)

    def wait(self, timeout: float) -> int:
        assert self.proc is not None
        code = self.proc.wait(timeout=timeout)
        self._reap()
        return code

    def _reap(self) -> None:
        if self.proc is not None:
            self.proc.wait(timeout=STARTUP_SECONDS)
            if self.proc.stdin is not None and not self.proc.stdin.closed:
                self.proc.stdin.close()
            self.proc = None
        if self._log_file is not None:
            self._log_file.close()
            self._log_file = None


SpawnServer = Callable[..., ServerProcess]


@pytest.fixture
def spawn_server(tmp_path: Path) -> Iterator[SpawnServer]:
    """Start server processes; every one still running is killed afterwards."""
    servers: list[ServerProcess] = []

    def spawn(
        data_dir: Path, database_url: str | None, *, start: bool = True, **options: Any
    ) -> ServerProcess:
        server = ServerProcess(
            data_dir, database_url, tmp_path / f"server-{len(servers)}.log", **options
        )
        servers.append(server)
        if start:
            server.start()
        return server

    yield spawn
    for server in servers:
        server.kill()


@pytest.fixture(
    params=[
        pytest.param("sqlite", id="sqlite"),
        pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
    ]
)
def migrated_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str | None]:
    """A migrated database for servers to share: None means the SQLite file in the data dir."""
    if request.param == "sqlite":
        upgrade_to_head(Settings(data_dir=tmp_path / "data").resolved_database_url)
        yield None
        return
    url: str = request.getfixturevalue("postgres_url")
    upgrade_to_head(url)
    yield url


def check(response: httpx.Response, *statuses: int) -> Any:
    """The JSON body of ``response`` (None when empty), after checking its status."""
    assert response.status_code in statuses, (
        f"{response.request.method} {response.request.url} -> {response.status_code}: "
        f"{response.text[:500]}"
    )
    return response.json() if response.content else None
