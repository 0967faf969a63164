"""``cuebank serve --workers N``: a listening socket per worker, connections spread over them,
a worker that dies replaced, and SIGTERM stopping them all.

The sockets are read from ``/proc`` (Linux, where the workers get sockets of their own).
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import textwrap
import time
from collections.abc import Callable
from pathlib import Path

import httpx
import pytest

from service.settings import Settings
from service.storage.migrate import upgrade_to_head

from .conftest import STARTUP_SECONDS, SpawnServer

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads sockets from /proc"),
]

LISTEN, ESTABLISHED = "0A", "01"  # socket states as /proc/net/tcp writes them


def workers_of(pid: int) -> list[int]:
    """The worker processes of the server ``pid`` (not multiprocessing's helper process)."""
    children = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
    found = []
    for child in map(int, children):
        try:
            command = Path(f"/proc/{child}/cmdline").read_bytes()
        except FileNotFoundError:
            continue
        if b"spawn_main" in command:
            found.append(child)
    return found


def sockets_on(pid: int, port: int, state: str) -> set[int]:
    """Inodes of the TCP sockets of process ``pid`` on local ``port`` in ``state``."""
    held = set()
    for fd in Path(f"/proc/{pid}/fd").iterdir():
        try:
            target = os.readlink(fd)
        except OSError:
            continue
        if target.startswith("socket:["):
            held.add(int(target[8:-1]))
    found = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        for line in Path(table).read_text().splitlines()[1:]:
            parts = line.split()
            local_port = int(parts[1].rsplit(":", 1)[1], 16)
            inode = int(parts[9])
            if local_port == port and parts[3] == state and inode in held:
                found.add(inode)
    return found


def migrated(data_dir: Path) -> Path:
    upgrade_to_head(Settings(data_dir=data_dir).resolved_database_url)
    return data_dir


def wait_for(
    check: Callable[[], bool],
    what: str,
    seconds: float = STARTUP_SECONDS,
    detail: Callable[[], str] = str,
) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}: {detail()}")


def test_each_worker_listens_on_its_own_socket_and_connections_spread(
    spawn_server: SpawnServer, tmp_path: Path
) -> None:
    server = spawn_server(migrated(tmp_path / "data"), None, args=["--workers", "2"])
    assert server.proc is not None
    workers: list[int] = []

    def two_workers_listening() -> bool:
        workers[:] = workers_of(server.proc.pid) if server.proc else []
        return len(workers) == 2 and all(sockets_on(w, server.port, LISTEN) for w in workers)

    wait_for(two_workers_listening, "two listening workers")
    listening = [sockets_on(w, server.port, LISTEN) for w in workers]
    # one socket each, not one shared: a shared socket is the same inode in both
    assert [len(s) for s in listening] == [1, 1]
    assert listening[0] != listening[1]

    # 32 connections opened at once, then used: with one shared socket the first worker to
    # wake often accepts them all; with a socket each the kernel picks one per connection by
    # a hash of the addresses, so all 32 on one worker has odds of 2 in 2^32.
    conns = [socket.create_connection(("127.0.0.1", server.port), timeout=10) for _ in range(32)]
    try:
        for conn in conns:
            conn.sendall(b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
        for conn in conns:
            assert conn.recv(65536).startswith(b"HTTP/1.1 200")
        held = [len(sockets_on(w, server.port, ESTABLISHED)) for w in workers]
        assert sum(held) == 32
        assert min(held) >= 1, held
    finally:
        for conn in conns:
            conn.close()


def test_a_worker_that_dies_is_replaced_and_sigterm_stops_them_all(
    spawn_server: SpawnServer, tmp_path: Path
) -> None:
    server = spawn_server(migrated(tmp_path / "data"), None, args=["--workers", "2"])
    assert server.proc is not None
    parent = server.proc.pid
    first: list[int] = []

    def two_listening() -> bool:
        first[:] = workers_of(parent)
        return len(first) == 2 and all(sockets_on(w, server.port, LISTEN) for w in first)

    wait_for(two_listening, "two listening workers")
    os.kill(first[0], signal.SIGKILL)

    def replaced() -> bool:
        now = workers_of(parent)
        if len(now) != 2 or first[0] in now:
            return False
        return all(sockets_on(w, server.port, LISTEN) for w in now)

    wait_for(
        replaced,
        "a worker in place of the killed one",
        detail=lambda: f"workers {workers_of(parent)}, killed {first[0]}; {server.log_text()}",
    )
    assert "starting another in its place" in server.log_text()
    with httpx.Client(timeout=10) as client:
        for _ in range(4):
            assert client.get(f"{server.url}/healthz").status_code == 200
    survivors = workers_of(parent)
    server.terminate()
    assert server.wait(timeout=30) == 0
    for pid in survivors:
        assert (
            not Path(f"/proc/{pid}").exists()
            or b"spawn_main" not in Path(f"/proc/{pid}/cmdline").read_bytes()
        )


# WorkerPool's own rules, with workers that do nothing but live or die. Spawned workers
# import their target by name, so it lives in a script of its own (the tests are no package).
POOL_SCRIPT = textwrap.dedent(
    """
    import os, signal, sys, threading, time
    from service.workers import WorkerPool

    def dies_at_once(started, code):
        sys.exit(code)

    def dies_once_after_starting(started, marker):
        started.set()
        try:
            os.close(os.open(marker, os.O_CREAT | os.O_EXCL))
        except FileExistsError:
            while True:
                time.sleep(0.1)
        sys.exit(7)

    def stop_when(pool, check):
        def watch():
            deadline = time.monotonic() + 60
            while not check() and time.monotonic() < deadline:
                time.sleep(0.05)
            os.kill(os.getpid(), signal.SIGTERM)
        threading.Thread(target=watch, daemon=True).start()

    if __name__ == "__main__":
        if sys.argv[1] == "early":
            pool = WorkerPool(2, dies_at_once, (5,), say=lambda text: print(text))
        else:
            pool = WorkerPool(2, dies_once_after_starting, (sys.argv[2],), say=print)
            stop_when(pool, lambda: pool.replaced >= 1)
        print("result", pool.run(), pool.replaced, flush=True)
    """
)


def run_pool(tmp_path: Path, *args: str) -> str:
    script = tmp_path / "pool_check.py"
    script.write_text(POOL_SCRIPT, encoding="utf-8")
    done = subprocess.run(
        [sys.executable, str(script), *args],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_pool_gives_up_when_a_worker_fails_before_it_starts(tmp_path: Path) -> None:
    out = run_pool(tmp_path, "early")
    assert "stopped with code 5 before it started serving" in out
    assert out.strip().endswith("result 1 0")


def test_pool_replaces_a_worker_that_dies_after_starting(tmp_path: Path) -> None:
    out = run_pool(tmp_path, "late", str(tmp_path / "died-once"))
    assert "stopped with code 7; starting another in its place" in out
    assert out.strip().endswith("result 0 1")
