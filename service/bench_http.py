"""The HTTP part of ``cuebank bench`` (section d): recall over a real server.

A collection of N = 1,024 units and P = 1,000 invented memories is built in a temporary data
directory through :class:`~service.recall.service.RecallService`, then served in a subprocess
on a free 127.0.0.1 port by the production command, ``cuebank serve --workers N`` (uvicorn with
uvloop and httptools, a listening socket per worker, one BLAS thread per worker). Four figures
come out of each server, all at the same concurrency:

* ``GET /healthz`` req/s and latency: what the server stack itself can do on this machine, in
  the same run, so the recall figures have a ceiling to be read against;
* single-cue ``POST .../recall`` req/s and latency, as a ratio to the first;
* ``POST .../recall:batch`` cues/s, with 64 and with 256 cues per request, each as a ratio to
  the engine's own cues/s called in-process on the same batches (one BLAS thread, as in a
  worker), in as many processes at once as the server has workers the cores can run, so
  both sides of the ratio run with the same parallelism on the same cores at the same time
  (one process's rate times the workers assumes they share nothing: caches, memory bus,
  clock). The multiple is reported beside it; on the 2-core machines here the two differed
  by noise more than by sharing.

The machines this runs on are shared and their speed drifts by a fifth or more within a minute,
so the figures compared are measured in turns: each server's four loads run in two rounds of
half the time each (one round with ``--quick``), and the in-process reference for each batch
size is measured before the first batch load and after each load of that size, with the
server idle beside it. Rates come
from the totals of the rounds, p99 is the worst round's.

The load comes from ``wrk`` when it is on PATH (C, a Lua script for the POST bodies), otherwise
from a few client processes, each an asyncio loop driving its share of the connections with
``httpx``. The report names which one ran: the Python client costs far more CPU per request,
and on a small machine it competes with the server for the same cores.

Examples
--------
>>> _duration_seconds("1.5ms"), _duration_seconds("250us"), _duration_seconds("2.00s")
(0.0015, 0.00025, 2.0)
>>> records = _memories(seed=3, count=5)
>>> len(records), records == _memories(seed=3, count=5)
(5, True)
>>> sum(f["units"] for f in SCHEMA["fields"])
1024
"""

from __future__ import annotations

import asyncio
import contextlib
import importlib.util
import json
import multiprocessing
import os
import random
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final

if TYPE_CHECKING:
    from multiprocessing.pool import Pool

    from service.bench import BenchConfig, Section
    from service.recall.service import RecallService

__all__ = ["SCHEMA", "measure"]

#: Text, category and number blocks summing to N = 1,024 units, the sizes the prototype used.
SCHEMA: Final[dict[str, Any]] = {
    "fields": [
        {"name": "title", "kind": "text", "units": 512},
        {"name": "maker", "kind": "text", "units": 256},
        {"name": "code", "kind": "category", "units": 128},
        {
            "name": "mass_g",
            "kind": "number",
            "units": 128,
            "tolerance": 5.0,
            "minimum": 0,
            "maximum": 2000,
        },
    ]
}
N_MEMORIES: Final = 1_000
#: Cues per batch request: a modest batch, and one a bulk client would send (a quarter of the
#: default ``max_batch``). The HTTP cost of a request is paid once per request, so the two
#: show how it thins out as batches grow.
BATCH_SIZES: Final = (64, 256)
BATCH_CUES: Final = BATCH_SIZES[0]
TEAM: Final = "bench"
COLLECTION: Final = "bench-http"
CLIENT_PROCESSES: Final = 4
#: Seconds per measurement; long enough for p99 to rest on thousands of requests.
QUICK_SECONDS: Final = 3
FULL_SECONDS: Final = 10
READY_TIMEOUT: Final = 30.0
STOP_TIMEOUT: Final = 10.0
DRAIN_TIMEOUT: Final = 3.0

# Syllables for invented part names; no attempt to resemble any real catalogue.
_SYLLABLES: Final = tuple("ka lo mi ren tus var po del si quor an bex ul zet mo fin gar".split())
_WORDS: Final = tuple("bracket spindle gasket valve coupler flange bushing sprocket".split())

_DURATION_UNITS: Final = {"us": 1e-6, "ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0}
_DURATION_RE: Final = re.compile(r"([\d.]+)(us|ms|s|m|h)")


def _duration_seconds(text: str) -> float:
    found = _DURATION_RE.fullmatch(text.strip())
    if found is None:
        raise ValueError(f"not a wrk duration: {text!r}")
    return round(float(found.group(1)) * _DURATION_UNITS[found.group(2)], 12)


# ---------------------------------------------------------------------------------------------
# data


def _word(rng: random.Random) -> str:
    return "".join(rng.choice(_SYLLABLES) for _ in range(rng.randint(2, 4)))


def _memories(seed: int, count: int = N_MEMORIES) -> list[tuple[str, dict[str, Any]]]:
    rng = random.Random(seed)
    out: list[tuple[str, dict[str, Any]]] = []
    for i in range(count):
        out.append(
            (
                f"P-{i:05d}",
                {
                    "title": f"{_word(rng).title()} {rng.choice(_WORDS)} {rng.randint(2, 90)}",
                    "maker": f"{_word(rng).title()} {_word(rng).title()}",
                    "code": f"K{rng.randrange(100_000):05d}",
                    "mass_g": round(rng.uniform(0.0, 2000.0), 1),
                },
            )
        )
    return out


def _typo(text: str, rng: random.Random) -> str:
    i = rng.randrange(1, len(text))
    return text[:i] + text[i + 1 :]


def _cues(
    records: Sequence[tuple[str, dict[str, Any]]], rng: random.Random, count: int
) -> list[dict[str, Any]]:
    """Fragments of stored memories: three of the four fields, one text field misspelt."""
    out: list[dict[str, Any]] = []
    for _ in range(count):
        _, fields = records[rng.randrange(len(records))]
        dropped = rng.choice(list(fields))
        cue = {k: v for k, v in fields.items() if k != dropped}
        for name in ("title", "maker"):
            if name in cue:
                cue[name] = _typo(str(cue[name]), rng)
                break
        out.append(cue)
    return out


# ---------------------------------------------------------------------------------------------
# preparation, in this process


@dataclass
class _Prepared:
    data_dir: Path
    team: str
    secret: str | None
    auth_note: str
    service: RecallService
    dispose: Any
    singles: list[dict[str, Any]]
    batches: dict[int, list[list[dict[str, Any]]]]  # by cues per request
    timings: dict[str, float] = field(default_factory=dict)


def _bench_key(settings: Any, sessions: Any) -> tuple[str, str | None, str]:
    """The team to use and a read key for it, when this build has API keys at all."""
    from service.recall.service import DEFAULT_TEAM

    if importlib.util.find_spec("service.recall.auth") is None:
        return DEFAULT_TEAM, None, "no key sent: this build has no service.recall.auth"
    from service.recall import auth

    keys = auth.KeyService(settings, sessions, auth.load_pepper(settings))
    keys.create_team(TEAM)
    _, secret = keys.create_key(TEAM, ["read"], label="bench")
    return TEAM, secret, f"a read key of team {TEAM!r} in 'Authorization: Bearer'"


def _prepare(data_dir: Path, seed: int) -> _Prepared:
    from service.recall.models import CollectionSpec
    from service.recall.service import RecallService
    from service.settings import Settings
    from service.storage.db import make_engine, make_session_factory
    from service.storage.migrate import upgrade_to_head

    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    # Explicit None: a deployment's database or pepper in the environment must not be used.
    settings = Settings(data_dir=data_dir, database_url=None, key_pepper=None)
    url = settings.resolved_database_url
    upgrade_to_head(url)
    engine = make_engine(url, sqlite_synchronous="NORMAL")
    sessions = make_session_factory(engine)
    try:
        team, secret, note = _bench_key(settings, sessions)
        service = RecallService(settings, sessions)
        service.create_collection(
            team, CollectionSpec(name=COLLECTION, schema=SCHEMA, rule="dense", seed=seed + 11)
        )
        records = _memories(seed + 12)
        service.import_memories(
            team,
            COLLECTION,
            ((i, key, fields) for i, (key, fields) in enumerate(records, start=1)),
        )
        timings["prepare_seconds"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        service.compile(team, COLLECTION)
        timings["compile_seconds"] = time.perf_counter() - t0
    except BaseException:
        engine.dispose()
        raise
    rng = random.Random(seed + 13)
    singles = _cues(records, rng, 256)
    batches = {size: [_cues(records, rng, size) for _ in range(16)] for size in BATCH_SIZES}
    return _Prepared(
        data_dir, team, secret, note, service, engine.dispose, singles, batches, timings
    )


def _blas_one_thread() -> tuple[Any, str]:
    """A context that holds BLAS to one thread, as in a worker, and what it did."""
    try:
        from threadpoolctl import (  # type: ignore[import-untyped]  # optional, no stubs
            threadpool_limits,
        )
    except ImportError:
        return contextlib.nullcontext(), "BLAS threads not limited: threadpoolctl is not installed"
    return threadpool_limits(limits=1, user_api="blas"), "one BLAS thread (threadpoolctl)"


def _recall_rate(
    service: RecallService,
    team: str,
    batches: Sequence[list[dict[str, Any]]],
    seconds: float,
    start_at: float | None = None,
) -> float:
    """Cues/s of ``RecallService.recall`` on ``batches`` for ``seconds`` (after one warm-up
    call, and from the wall-clock time ``start_at`` when given)."""
    from service.recall.models import RecallOptions

    options = RecallOptions()
    service.recall(team, COLLECTION, batches[0], options)
    if start_at is not None:
        time.sleep(max(0.0, start_at - time.time()))
    done = 0
    i = 0
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        batch = batches[i % len(batches)]
        service.recall(team, COLLECTION, batch, options)
        done += len(batch)
        i += 1
    return done / (time.perf_counter() - t0)


def _in_process_rate(prep: _Prepared, seconds: float) -> tuple[float, str]:
    """Cues/s of ``RecallService.recall`` on the batches, in this process, with one BLAS
    thread like a worker."""
    limit, note = _blas_one_thread()
    with limit:
        return _recall_rate(prep.service, prep.team, prep.batches[BATCH_CUES], seconds), note


_CHILD: Any = None  # a pool child's RecallService, built once by _child_init


def _child_init(data_dir: str) -> None:
    """Pool initializer: open the prepared database once per child process."""
    from service.recall.service import RecallService
    from service.settings import Settings
    from service.storage.db import make_engine, make_session_factory

    global _CHILD
    settings = Settings(data_dir=Path(data_dir), database_url=None, key_pepper=None)
    _CHILD = RecallService(
        settings, make_session_factory(make_engine(settings.resolved_database_url))
    )
    _blas_one_thread()[0].__enter__()  # for the child's whole life, as in a worker


def _rate_in_child(job: tuple[str, list[list[dict[str, Any]]], float, float]) -> float:
    """:func:`_recall_rate` in a pool child (its first call also compiles the collection)."""
    team, batches, seconds, start_at = job
    return _recall_rate(_CHILD, team, batches, seconds, start_at)


class _Reference:
    """The engine's in-process cues/s on the bench batches, in as many fresh processes at
    once as the server runs workers, measured as often as asked (fresh, like the workers:
    this process has built the collection and holds its objects).

    Processes recalling side by side share the caches, the memory bus and the clock, which
    one process's rate times the count does not show; and a shared machine drifts, so the
    reference is measured next to each HTTP measurement it is compared with.
    """

    def __init__(self, prep: _Prepared, processes: int) -> None:
        self.prep = prep
        self.processes = processes
        self.rates: dict[int, list[float]] = {size: [] for size in prep.batches}
        self._pool: Pool = multiprocessing.get_context("spawn").Pool(
            processes, initializer=_child_init, initargs=(str(prep.data_dir),)
        )

    def measure(self, seconds: float, size: int = BATCH_CUES) -> float:
        """Cues/s on the batches of ``size`` cues, all processes at once."""
        # a common start, late enough for every child to be up and warmed
        start_at = time.time() + (5.0 if not any(self.rates.values()) else 0.5)
        job = (self.prep.team, self.prep.batches[size], seconds, start_at)
        rate = float(sum(self._pool.map(_rate_in_child, [job] * self.processes)))
        self.rates[size].append(rate)
        return rate

    def close(self) -> None:
        self._pool.terminate()
        self._pool.join()


# ---------------------------------------------------------------------------------------------
# the server, in a subprocess


def _free_port() -> int:
    # The port can be taken between this probe and the server's bind; the server then exits at
    # once and the readiness wait reports it, which is rare enough not to retry.
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _stack() -> tuple[str, str]:
    loop = "uvloop" if importlib.util.find_spec("uvloop") else "asyncio"
    http = "httptools" if importlib.util.find_spec("httptools") else "h11"
    return loop, http


def _server_command(port: int, workers: int) -> list[str]:
    """The production command: ``cuebank serve`` (uvicorn with uvloop and httptools when
    installed, no server header, the app's own access log, a listening socket per worker)."""
    return [
        sys.executable,
        "-m",
        "service.cli",
        "serve",
        "--host",
        "127.0.0.1",
        "--port",
        str(port),
        "--workers",
        str(workers),
    ]


def _server_env(data_dir: Path) -> dict[str, str]:
    # Every CUEBANK_* of the caller is dropped so the server reads the same database and pepper
    # as the preparation did, and the limits are the defaults a fresh deployment has.
    env = {k: v for k, v in os.environ.items() if not k.startswith("CUEBANK_")}
    env.update(
        {
            "CUEBANK_DATA_DIR": str(data_dir),
            "CUEBANK_LOG_LEVEL": "WARNING",
            # The per-key limiter still runs on every request; only its allowance is raised,
            # or the bench would measure 50 req/s, the default rate.
            "CUEBANK_RATE_PER_SECOND": "1000000",
            "CUEBANK_BURST": "1000000",
            # Workers are the parallelism; BLAS threads on top would fight them for the cores.
            "OPENBLAS_NUM_THREADS": "1",
            "OMP_NUM_THREADS": "1",
            "MKL_NUM_THREADS": "1",
        }
    )
    return env


def _tail(path: Path, lines: int = 6) -> str:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return ""
    return " | ".join(x.strip() for x in text.strip().splitlines()[-lines:])


class ServerFailed(RuntimeError):
    """The server did not start, or stopped answering as it should."""


def _wait_ready(proc: subprocess.Popen[bytes], base: str, log: Path) -> None:
    import httpx

    deadline = time.monotonic() + READY_TIMEOUT
    with httpx.Client(timeout=2.0) as client:
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                raise ServerFailed(f"the server exited with code {proc.returncode}: {_tail(log)}")
            with contextlib.suppress(httpx.HTTPError):
                if client.get(f"{base}/readyz").status_code == 200:
                    return
            time.sleep(0.1)
    raise ServerFailed(f"/readyz did not answer 200 within {READY_TIMEOUT:.0f} s: {_tail(log)}")


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=STOP_TIMEOUT)
        except subprocess.TimeoutExpired:
            pass
    # The server runs in a session of its own, so its group id is its pid: this reaches any
    # worker the supervisor left behind and nothing else.
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(proc.pid, signal.SIGKILL)
    with contextlib.suppress(subprocess.TimeoutExpired):
        proc.wait(timeout=STOP_TIMEOUT)


@contextlib.contextmanager
def _server(data_dir: Path, workers: int, log: Path) -> Iterator[str]:
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    root = Path(__file__).resolve().parents[1]
    with log.open("ab") as out:
        proc = subprocess.Popen(
            _server_command(port, workers),
            cwd=root,
            env=_server_env(data_dir),
            stdin=subprocess.DEVNULL,
            stdout=out,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    try:
        _wait_ready(proc, base, log)
        yield base
    finally:
        _stop(proc)


# ---------------------------------------------------------------------------------------------
# load generators


@dataclass(frozen=True)
class _Target:
    """What to send: one URL, and the bodies to cycle through (none for a GET)."""

    url: str
    method: str
    bodies: tuple[bytes, ...]
    headers: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class _Load:
    requests: int
    seconds: float
    requests_per_second: float
    p50_ms: float
    p99_ms: float
    non_2xx: int
    errors: int


def combine_loads(loads: Sequence[_Load]) -> _Load:
    """Rounds of one figure as one: counts and times added, the rate from the totals, the
    median of the rounds' p50 and the worst of their p99.

    >>> a = _Load(100, 1.0, 100.0, 2.0, 9.0, 0, 0)
    >>> b = _Load(300, 1.0, 300.0, 4.0, 7.0, 1, 0)
    >>> c = combine_loads([a, b])
    >>> c.requests, c.requests_per_second, c.p50_ms, c.p99_ms, c.non_2xx
    (400, 200.0, 3.0, 9.0, 1)
    """
    requests = sum(x.requests for x in loads)
    seconds = sum(x.seconds for x in loads)
    return _Load(
        requests=requests,
        seconds=seconds,
        requests_per_second=requests / seconds if seconds > 0 else 0.0,
        p50_ms=statistics.median(x.p50_ms for x in loads),
        p99_ms=max(x.p99_ms for x in loads),
        non_2xx=sum(x.non_2xx for x in loads),
        errors=sum(x.errors for x in loads),
    )


class _Generator:
    name: str = ""

    def run(self, target: _Target, seconds: int, concurrency: int) -> _Load:
        raise NotImplementedError

    def close(self) -> None:
        """Release whatever the generator holds (client processes)."""


class _Wrk(_Generator):
    def __init__(self, exe: str, work_dir: Path, threads: int) -> None:
        self.exe = exe
        self.work_dir = work_dir
        self.threads = threads
        self.name = f"wrk ({threads} threads)"
        self._scripts = 0

    def _script(self, target: _Target) -> Path:
        # Formatting every request once in init() keeps the per-request Lua work to a lookup.
        lines = [f'wrk.method = "{target.method}"']
        lines += [f'wrk.headers["{k}"] = "{v}"' for k, v in target.headers]
        lines.append("local bodies = {")
        for body in target.bodies:
            text = body.decode("utf-8")
            if "]==]" in text:
                raise ValueError("a body holds the Lua long-string terminator ']==]'")
            lines.append(f"[==[{text}]==],")
        lines += [
            "}",
            "local reqs = {}",
            "local i = 0",
            "function init(args)",
            "  for k, b in ipairs(bodies) do reqs[k] = wrk.format(nil, nil, nil, b) end",
            "end",
            "function request()",
            "  i = i % #reqs + 1",
            "  return reqs[i]",
            "end",
        ]
        self._scripts += 1
        path = self.work_dir / f"bench-{self._scripts}.lua"
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return path

    def run(self, target: _Target, seconds: int, concurrency: int) -> _Load:
        cmd = [
            self.exe,
            f"-t{min(self.threads, concurrency)}",
            f"-c{concurrency}",
            f"-d{seconds}s",
            "--timeout",
            "10s",
            "--latency",
        ]
        if target.bodies:
            cmd += ["-s", str(self._script(target))]
        else:
            for k, v in target.headers:
                cmd += ["-H", f"{k}: {v}"]
        done = subprocess.run(
            [*cmd, target.url],
            capture_output=True,
            text=True,
            timeout=seconds + 30,
            check=False,
        )
        if done.returncode != 0:
            raise ServerFailed(f"wrk exited with code {done.returncode}: {done.stderr.strip()}")
        return parse_wrk(done.stdout)


def parse_wrk(text: str) -> _Load:
    """The figures of a ``wrk --latency`` report.

    Examples
    --------
    >>> out = '''Running 3s test @ http://127.0.0.1:1/healthz
    ...   2 threads and 16 connections
    ...   Latency Distribution
    ...      50%    1.20ms
    ...      75%    1.50ms
    ...      90%    2.00ms
    ...      99%  850.00us
    ...   3000 requests in 3.00s, 0.50MB read
    ...   Non-2xx or 3xx responses: 2
    ...   Socket errors: connect 0, read 1, write 0, timeout 3
    ... Requests/sec:   1000.00
    ... '''
    >>> load = parse_wrk(out)
    >>> load.requests, load.p50_ms, load.p99_ms, load.non_2xx, load.errors
    (3000, 1.2, 0.85, 2, 4)
    """
    percentiles: dict[str, float] = {}
    for found in re.finditer(r"^\s*(50|99)(?:\.0+)?%\s+(\S+)\s*$", text, re.MULTILINE):
        percentiles[found.group(1)] = _duration_seconds(found.group(2)) * 1000.0
    total = re.search(r"(\d+) requests in (\S+),", text)
    rate = re.search(r"Requests/sec:\s+([\d.]+)", text)
    if total is None or rate is None or set(percentiles) != {"50", "99"}:
        raise ServerFailed(f"cannot read the wrk report: {text.strip()[:300]!r}")
    bad = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", text)
    sockets = re.search(r"Socket errors:(.*)$", text, re.MULTILINE)
    errors = sum(int(x) for x in re.findall(r"\d+", sockets.group(1))) if sockets else 0
    return _Load(
        requests=int(total.group(1)),
        seconds=_duration_seconds(total.group(2)),
        requests_per_second=float(rate.group(1)),
        p50_ms=round(percentiles["50"], 6),
        p99_ms=round(percentiles["99"], 6),
        non_2xx=int(bad.group(1)) if bad else 0,
        errors=errors,
    )


_ClientResult = tuple[list[float], int, int, float]


async def _drive(
    target: _Target, connections: int, start_at: float, seconds: float
) -> _ClientResult:
    import httpx

    limits = httpx.Limits(max_connections=connections, max_keepalive_connections=connections)
    latencies: list[float] = []
    non_2xx = 0
    errors = 0
    bodies = target.bodies or (b"",)
    async with httpx.AsyncClient(
        limits=limits, timeout=10.0, headers=dict(target.headers)
    ) as client:

        async def send(body: bytes) -> int:
            content = body if target.bodies else None
            response = await client.request(target.method, target.url, content=content)
            return response.status_code

        # Connections are opened before the clock starts, as wrk does.
        await asyncio.gather(*(send(bodies[0]) for _ in range(connections)))
        await asyncio.sleep(max(0.0, start_at - time.time()))
        started = time.perf_counter()
        end = started + seconds

        async def worker(k: int) -> None:
            nonlocal non_2xx, errors
            i = k
            while True:
                t0 = time.perf_counter()
                if t0 >= end:
                    return
                try:
                    status = await send(bodies[i % len(bodies)])
                except httpx.HTTPError:
                    errors += 1
                    await asyncio.sleep(0.01)  # a dead server must not turn this into a spin
                    continue
                latencies.append(time.perf_counter() - t0)
                if not 200 <= status < 300:
                    non_2xx += 1
                i += connections

        await asyncio.gather(*(worker(k) for k in range(connections)))
        elapsed = time.perf_counter() - started
    return latencies, non_2xx, errors, elapsed


def _client_process(job: tuple[_Target, int, float, float]) -> _ClientResult:
    target, connections, start_at, seconds = job
    coro = _drive(target, connections, start_at, seconds)
    if importlib.util.find_spec("uvloop") is not None:
        import uvloop

        return uvloop.run(coro)
    return asyncio.run(coro)


class _HttpxClients(_Generator):
    def __init__(self, processes: int) -> None:
        self.processes = processes
        self.name = f"httpx, {processes} processes"
        # spawn: a fork would copy this process's BLAS threads and open database handles
        self._pool: Pool = multiprocessing.get_context("spawn").Pool(processes)

    def run(self, target: _Target, seconds: int, concurrency: int) -> _Load:
        import numpy as np

        shares = [
            concurrency // self.processes + (1 if i < concurrency % self.processes else 0)
            for i in range(self.processes)
        ]
        # Starting together leaves the spawn and connect time out of every client's window.
        start_at = time.time() + 0.3
        jobs = [(target, n, start_at, float(seconds)) for n in shares if n > 0]
        results = self._pool.map(_client_process, jobs)
        latencies = np.concatenate([np.asarray(r[0], dtype=np.float64) for r in results])
        if latencies.size == 0:
            raise ServerFailed(f"no request to {target.url} completed")
        p50, p99 = np.percentile(latencies, [50, 99]) * 1000.0
        return _Load(
            requests=int(latencies.size),
            seconds=max(r[3] for r in results),
            requests_per_second=sum(len(r[0]) / r[3] for r in results),
            p50_ms=round(float(p50), 6),
            p99_ms=round(float(p99), 6),
            non_2xx=sum(r[1] for r in results),
            errors=sum(r[2] for r in results),
        )

    def close(self) -> None:
        self._pool.terminate()
        self._pool.join()


def _generator(work_dir: Path, cpus: int) -> _Generator:
    choice = os.environ.get("CUEBANK_BENCH_LOAD", "auto").lower()
    exe = shutil.which("wrk")
    if choice in ("auto", "wrk") and exe is not None:
        return _Wrk(exe, work_dir, threads=max(1, cpus))
    return _HttpxClients(CLIENT_PROCESSES)


# ---------------------------------------------------------------------------------------------
# the section


def _usable_cpus() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        return os.cpu_count() or 1


def recommended_workers(cpus: int) -> int:
    """One worker per usable core: a recall holds its worker's event loop while it computes,
    so workers are the only way two recalls run at once, and one BLAS thread each keeps them
    from fighting over the cores.

    >>> recommended_workers(2), recommended_workers(1)
    (2, 1)
    """
    return max(1, cpus)


def _targets(prep: _Prepared, base: str) -> dict[str, _Target]:
    headers = [("Content-Type", "application/json")]
    if prep.secret is not None:
        headers.append(("Authorization", f"Bearer {prep.secret}"))
    recall = f"{base}/v1/collections/{COLLECTION}/recall"

    def encode(doc: dict[str, Any]) -> bytes:
        return json.dumps(doc, separators=(",", ":"), ensure_ascii=False).encode("utf-8")

    return {
        "healthz": _Target(f"{base}/healthz", "GET", (), ()),
        "recall": _Target(
            recall, "POST", tuple(encode({"cue": c}) for c in prep.singles), tuple(headers)
        ),
        **{
            _batch(size): _Target(
                f"{recall}:batch",
                "POST",
                tuple(encode({"cues": b}) for b in batches),
                tuple(headers),
            )
            for size, batches in prep.batches.items()
        },
    }


def _batch(size: int) -> str:
    """The name of the batch load of ``size`` cues per request."""
    return f"batch-{size}"


def _check_answers(targets: dict[str, _Target]) -> None:
    """One request of each kind, answered 200 with a verdict, before any load is sent."""
    import httpx

    with httpx.Client(timeout=60.0) as client:
        for name in ("recall", *map(_batch, BATCH_SIZES)):
            t = targets[name]
            response = client.post(t.url, content=t.bodies[0], headers=dict(t.headers))
            if response.status_code != 200 or b"verdict" not in response.content:
                raise ServerFailed(
                    f"{name} answered {response.status_code}: {response.text[:200]!r}"
                )


def _drain(base: str) -> None:
    """Wait until the server is idle again.

    A load generator that stops closes its connections, but the requests already handed to a
    worker's thread pool still run to the end; the next figure would pay for that backlog.
    Fresh connections spread the probes over the workers.
    """
    import httpx

    deadline = time.monotonic() + DRAIN_TIMEOUT
    fast = 0
    with httpx.Client(timeout=DRAIN_TIMEOUT, headers={"Connection": "close"}) as client:
        while fast < 5 and time.monotonic() < deadline:
            t0 = time.perf_counter()
            with contextlib.suppress(httpx.HTTPError):
                client.get(f"{base}/healthz")
            fast = fast + 1 if time.perf_counter() - t0 < 0.02 else 0
            time.sleep(0.05)


def _warm_up(gen: _Generator, targets: dict[str, _Target], concurrency: int) -> int:
    """Load until no worker is still compiling; return the bursts it took.

    Each worker compiles on its first recall, and connections land on workers as the kernel
    pleases, so a burst is repeated until its tail looks like the rest of it.
    """
    bursts = 0
    while bursts < 4:
        bursts += 1
        load = gen.run(targets["recall"], 1, concurrency)
        if load.non_2xx == 0 and load.p99_ms < max(100.0, 5.0 * load.p50_ms):
            break
    for size in BATCH_SIZES:
        gen.run(targets[_batch(size)], 1, concurrency)
    return bursts


def _row(
    workers: int, endpoint: str, gen: _Generator, load: _Load, concurrency: int
) -> dict[str, Any]:
    return {
        "workers": workers,
        "endpoint": endpoint,
        "generator": gen.name,
        "concurrency": concurrency,
        "requests": load.requests,
        "seconds": load.seconds,
        "requests_per_second": load.requests_per_second,
        "p50_ms": load.p50_ms,
        "p99_ms": load.p99_ms,
        "non_2xx": load.non_2xx,
        "errors": load.errors,
    }


def _measure_server(
    sec: Section,
    prep: _Prepared,
    gen: _Generator,
    workers: int,
    seconds: int,
    concurrency: int,
    in_process: float,
    cpus: int,
    rate_seconds: float,
    rounds: int,
) -> None:
    running = min(workers, cpus)
    reference = _Reference(prep, running)
    log = prep.data_dir / f"server-{workers}.log"
    try:
        for size in BATCH_SIZES:  # up and warm before the server takes the cores
            reference.measure(rate_seconds, size)
        t0 = time.perf_counter()
        with _server(prep.data_dir, workers, log) as base:
            started = time.perf_counter() - t0
            targets = _targets(prep, base)
            _check_answers(targets)
            bursts = _warm_up(gen, targets, concurrency)
            runs: dict[str, list[_Load]] = {name: [] for name in targets}
            sizes = {_batch(size): size for size in BATCH_SIZES}
            # The figures compared are measured in turns, A B A B, each round a share of the
            # time, so a drift of the machine's speed falls on both sides of every ratio.
            for _ in range(rounds):
                for name in runs:
                    _drain(base)
                    runs[name].append(
                        gen.run(targets[name], max(1, seconds // rounds), concurrency)
                    )
                    if name in sizes:
                        reference.measure(rate_seconds, sizes[name])  # the idle server beside it
            loads = {name: combine_loads(runs[name]) for name in runs}
    finally:
        reference.close()
    health, single = loads["healthz"], loads["recall"]
    top = health.requests_per_second
    sec.rows.append({**_row(workers, "GET /healthz", gen, health, concurrency), "ratio": 1.0})
    sec.rows.append(
        {
            **_row(workers, "POST recall (1 cue)", gen, single, concurrency),
            "cues_per_second": single.requests_per_second,
            "ratio": single.requests_per_second / top,
            "ratio_to": "healthz req/s",
        }
    )
    tag = f"{workers} worker{'s' if workers > 1 else ''}, c = {concurrency}"
    ratio = sec.rows[-1]["ratio"]
    sec.target(f"HTTP 1-cue recall / healthz req/s ({tag})", ratio, 0.5, at_least=True)
    sec.target(f"HTTP 1-cue recall p99 ms ({tag})", single.p99_ms, 10.0, at_least=False)
    for size in BATCH_SIZES:
        batch, rates = loads[_batch(size)], reference.rates[size]
        side_by_side = sum(rates) / len(rates)
        cues = batch.requests_per_second * size
        sec.rows.append(
            {
                **_row(workers, f"POST recall:batch ({size})", gen, batch, concurrency),
                "cues_per_second": cues,
                "ratio": cues / side_by_side,
                "ratio_to": (
                    f"in-process, {running} processes at once"
                    if running > 1
                    else "in-process, 1 process"
                ),
            }
        )
        sec.summary[f"in_process_{running}p_{size}_cues_per_second"] = side_by_side
        sec.summary[f"in_process_{running}p_{size}_measurements"] = ", ".join(
            f"{r:,.0f}" for r in rates
        )
        ratio = sec.rows[-1]["ratio"]
        sec.target(f"HTTP batch of {size} / in-process cues/s ({tag})", ratio, 0.8, at_least=True)
    if running > 1:
        # what the plain multiple would have claimed, for comparison
        plain = sum(reference.rates[BATCH_CUES]) / len(reference.rates[BATCH_CUES])
        sec.summary[f"in_process_{running}p_over_{running}x_one"] = round(
            plain / (running * in_process), 3
        )
    sec.summary[f"server_{workers}w_start_seconds"] = round(started, 3)
    sec.summary[f"server_{workers}w_warm_up_bursts"] = bursts


def measure(cfg: BenchConfig, sec: Section) -> Section:
    """Fill ``sec`` with the HTTP figures, or say why they were not measured."""
    if importlib.util.find_spec("uvicorn") is None or importlib.util.find_spec("httpx") is None:
        sec.skipped = "not measured: uvicorn and httpx are needed to serve and to load the server"
        return sec
    concurrency = cfg.http_concurrency
    seconds = QUICK_SECONDS if cfg.quick else FULL_SECONDS
    cpus = _usable_cpus()
    best = recommended_workers(cpus)
    counts = [best] if cfg.quick else sorted({1, best})
    sec.title = (
        f"d. HTTP: recall over a real server against its trivial endpoint (N = 1024, "
        f"P = {N_MEMORIES:,}, concurrency {concurrency}, {seconds} s per figure)"
    )
    loop, http = _stack()
    work = Path(tempfile.mkdtemp(prefix="cuebank-bench-http-"))
    prep: _Prepared | None = None
    gen: _Generator | None = None
    try:
        prep = _prepare(work, cfg.seed)
        rate_seconds = 1.0 if cfg.quick else 2.0
        in_process, blas_note = _in_process_rate(prep, rate_seconds)
        gen = _generator(work, cpus)
        sec.summary.update(
            {
                "generator": gen.name,
                "server": f"cuebank serve --workers N (uvicorn, {loop} + {http}, a listening "
                "socket per worker where the kernel spreads connections over them), "
                "OPENBLAS_NUM_THREADS=1",
                "workers_measured": ", ".join(map(str, counts)),
                "recommended_workers": best,
                "auth": prep.auth_note,
                "batch_cues": ", ".join(map(str, BATCH_SIZES)),
                "in_process_cues_per_second": in_process,
                "in_process_blas": blas_note,
                **{k: round(v, 3) for k, v in prep.timings.items()},
            }
        )
        for workers in counts:
            _measure_server(
                sec,
                prep,
                gen,
                workers,
                seconds,
                concurrency,
                in_process,
                cpus,
                rate_seconds,
                rounds=1 if cfg.quick else 2,
            )
        sec.summary["non_2xx_total"] = sum(int(r["non_2xx"]) for r in sec.rows)
    # Any failure here (a port, a missing binary, a server that will not start) must cost only
    # this section: the others were measured and still get reported.
    except Exception as exc:
        done = f" ({len(sec.rows)} rows measured before it)" if sec.rows else ""
        sec.skipped = f"not measured: {type(exc).__name__}: {exc}{done}"
    finally:
        if gen is not None:
            gen.close()
        if prep is not None:
            prep.dispose()
        shutil.rmtree(work, ignore_errors=True)
    return sec
