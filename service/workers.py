"""Several worker processes on one port, each listening on a socket of its own.

uvicorn's ``--workers`` hands one listening socket to every worker, and a worker's event loop
accepts every connection waiting when it wakes. Sixteen connections opened at once then all
land on one worker in about one run in five (measured on the 2-core development machine:
2 and 3 runs of 12 of ``wrk -c16`` put 96% or more of the load on one of two workers), and a
client that keeps its connections open, as every HTTP client pool does, then uses one worker
of several for as long as they stay open.

Here each worker binds the port itself with ``SO_REUSEPORT``, and Linux hands each new
connection to one of the listening sockets by a hash of its addresses, whatever the workers
happen to be doing. Other systems do not spread connections over such sockets, so
:func:`spreads_connections` is false there and the caller keeps uvicorn's shared socket.

:class:`WorkerPool` is the parent's side: it starts the workers, starts a new one in place of
one that dies after it has started, stops them all on SIGINT or SIGTERM (each finishes the
requests in flight, as a single server does), and gives up with an error when a worker exits
with an error before it has started, since a replacement would only fail the same way.
"""

from __future__ import annotations

import multiprocessing
import multiprocessing.connection
import os
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable, Sequence
from multiprocessing.context import SpawnProcess
from multiprocessing.synchronize import Event
from types import FrameType
from typing import Any, Final

__all__ = ["WorkerPool", "reuse_port_socket", "spreads_connections"]

#: Backlog of each worker's listening socket (uvicorn's default).
BACKLOG: Final = 2048
#: Pause before a worker that died after starting is replaced.
RESTART_PAUSE: Final = 0.5
#: How often a worker looks whether its parent is still there.
PARENT_CHECK_SECONDS: Final = 0.5


def spreads_connections() -> bool:
    """Whether the kernel spreads connections over sockets that share a port (Linux)."""
    return sys.platform.startswith("linux") and hasattr(socket, "SO_REUSEPORT")


def reuse_port_socket(host: str, port: int, *, listen: bool = True) -> socket.socket:
    """A socket bound to ``host``:``port`` beside the other workers' (``SO_REUSEPORT``).

    Unless ``listen``, it is only bound: the kernel hands connections to a socket once it
    listens, so a worker that leaves that to its server listens only once it is ready.

    >>> a = reuse_port_socket("127.0.0.1", 0)
    >>> b = reuse_port_socket("127.0.0.1", a.getsockname()[1])
    >>> a.getsockname() == b.getsockname()
    True
    >>> a.close(); b.close()
    """
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
        sock.bind((host, port))
        if listen:
            sock.listen(BACKLOG)
    except OSError:
        sock.close()
        raise
    return sock


def _worker_main(target: Callable[..., Any], started: Event, *args: Any) -> None:
    """A worker's life: ``target(started, *args)``, stopped (SIGTERM) if the parent goes.

    A parent killed outright (SIGKILL, the OOM killer) runs no code, and its workers would
    go on holding the port; each worker watches for that itself.
    """
    parent = os.getppid()

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(PARENT_CHECK_SECONDS)
        os.kill(os.getpid(), signal.SIGTERM)

    threading.Thread(target=watch, name="cuebank-parent-watch", daemon=True).start()
    target(started, *args)


class WorkerPool:
    """Runs ``target(started, *args)`` in ``count`` spawned processes until told to stop.

    ``target`` must be importable by name (the processes are spawned) and must call
    ``started.set()`` once it serves. A worker that exits with an error before that stops
    the pool; one that dies later, or is killed by a signal at any time, is replaced.

    Parameters
    ----------
    count : int
        Worker processes.
    target, args
        What each worker runs.
    stop_seconds : float
        How long stopped workers get to finish before they are killed.
    say : callable
        Where the pool's one-line messages go (standard error by default).
    """

    def __init__(
        self,
        count: int,
        target: Callable[..., Any],
        args: Sequence[Any] = (),
        *,
        stop_seconds: float = 15.0,
        say: Callable[[str], None] | None = None,
    ) -> None:
        if count < 1:
            raise ValueError(f"count must be at least 1, got {count}")
        self.count = count
        self.target = target
        self.args = tuple(args)
        self.stop_seconds = stop_seconds
        self.say = say or (lambda text: print(text, file=sys.stderr, flush=True))
        self.replaced = 0  # workers started in place of one that died, for the tests
        self._context = multiprocessing.get_context("spawn")
        self._stopping = False

    def run(self) -> int:
        """Serve until SIGINT or SIGTERM (0), or until a worker fails starting up (1)."""
        previous = {
            sig: signal.signal(sig, self._on_signal) for sig in (signal.SIGINT, signal.SIGTERM)
        }
        workers: list[tuple[SpawnProcess, Event]] = []
        try:
            for i in range(self.count):  # one at a time: those started are stopped on an error
                workers.append(self._start(i))
            return self._supervise(workers)
        finally:
            self._stop([process for process, _ in workers])
            for sig, handler in previous.items():
                signal.signal(sig, handler)

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        self._stopping = True

    def _start(self, index: int) -> tuple[SpawnProcess, Event]:
        started = self._context.Event()
        process = self._context.Process(
            target=_worker_main,
            args=(self.target, started, *self.args),
            name=f"cuebank-worker-{index + 1}",
        )
        process.start()
        return process, started

    def _supervise(self, workers: list[tuple[SpawnProcess, Event]]) -> int:
        while not self._stopping:
            # a short wait: signals set the flag, and Python runs handlers between waits
            multiprocessing.connection.wait([p.sentinel for p, _ in workers], timeout=0.2)
            for i, (process, started) in enumerate(workers):
                if process.is_alive() or self._stopping:
                    continue
                code = process.exitcode
                if not started.is_set() and code is not None and code > 0:
                    self.say(
                        f"worker {i + 1} (pid {process.pid}) stopped with code {code} before "
                        "it started serving; stopping the others (see the log above)"
                    )
                    return 1
                self.say(
                    f"worker {i + 1} (pid {process.pid}) stopped with code {code}; "
                    "starting another in its place"
                )
                time.sleep(RESTART_PAUSE)
                workers[i] = self._start(i)
                self.replaced += 1
        return 0

    def _stop(self, processes: Sequence[SpawnProcess]) -> None:
        for process in processes:
            if process.is_alive():
                process.terminate()  # SIGTERM: the server finishes its requests and exits
        deadline = time.monotonic() + self.stop_seconds
        for process in processes:
            process.join(max(0.0, deadline - time.monotonic()))
            if process.is_alive():
                process.kill()
                process.join()
