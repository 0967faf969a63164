"""Stopping without dropping work: readiness fails first, then requests in flight finish.

A process supervisor stops a worker with SIGTERM (Ctrl+C sends SIGINT). On the first of these
the app marks itself draining, so ``/readyz`` answers 503 and a load balancer stops routing new
requests to it, while every request keeps being served. After ``shutdown_drain_seconds`` the
signal is handed on to the server (uvicorn), which stops accepting connections, waits for the
requests in flight (up to its graceful timeout) and only then runs the lifespan's shutdown.
A second signal is handed on at once: an operator who insists is not kept waiting.

Signal handlers can only be set from the main thread; a server running in another thread (the
end-to-end tests do that) still becomes draining when its lifespan shuts down.
"""

from __future__ import annotations

import asyncio
import signal
import threading
from types import FrameType
from typing import Any

__all__ = ["HANDLED_SIGNALS", "Lifecycle"]

HANDLED_SIGNALS = (signal.SIGTERM, signal.SIGINT)


class Lifecycle:
    """Whether the app is draining, and the signal hooks that make it so."""

    def __init__(self, drain_seconds: float = 0.0) -> None:
        self.drain_seconds = drain_seconds
        self.draining = False
        self._previous: dict[int, Any] = {}
        self._loop: asyncio.AbstractEventLoop | None = None
        self._handed_on = False

    def install(self) -> None:
        """Put the draining hook in front of the current SIGTERM and SIGINT handlers."""
        if threading.current_thread() is not threading.main_thread():
            return
        self._loop = asyncio.get_running_loop()
        for sig in HANDLED_SIGNALS:
            self._previous[sig] = signal.signal(sig, self._on_signal)

    def uninstall(self) -> None:
        """Give the signals back to whoever had them, unless someone replaced the hook since."""
        for sig, previous in self._previous.items():
            if signal.getsignal(sig) == self._on_signal:
                signal.signal(sig, previous)
        self._previous.clear()

    def shut_down(self) -> None:
        """Called by the lifespan's shutdown: draining from now on, signals handed back."""
        self.draining = True
        self.uninstall()

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        first = not self.draining
        self.draining = True
        if first and self.drain_seconds > 0 and self._loop is not None:
            # A signal handler must return quickly and may interrupt the loop anywhere, so the
            # delayed hand-on is scheduled through the thread-safe entry point.
            self._loop.call_soon_threadsafe(
                self._loop.call_later, self.drain_seconds, self._hand_on_once, signum
            )
            return
        self._hand_on(signum, frame)

    def _hand_on_once(self, signum: int) -> None:
        # An impatient second signal may already have started the server's shutdown; handing
        # this one on too would make uvicorn treat it as a forced exit.
        if not self._handed_on:
            self._hand_on(signum, None)

    def _hand_on(self, signum: int, frame: FrameType | None) -> None:
        self._handed_on = True
        previous = self._previous.get(signum, signal.SIG_DFL)
        if callable(previous):
            previous(signum, frame)
        elif previous == signal.SIG_DFL:
            # Nobody else was listening: do what the signal would have done without us.
            signal.signal(signum, signal.SIG_DFL)
            signal.raise_signal(signum)
