"""The ``cuebank`` command: run the service, migrate its database, start the demo, bench.

Exit codes are part of the interface (scripts and service managers read them); they are listed
in ``cuebank --help`` and kept in one place here.
"""

from __future__ import annotations

import argparse
import errno
import importlib.util
import json
import os
import shlex
import socket
import sys
import textwrap
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, Final, NoReturn

if TYPE_CHECKING:
    from fastapi import FastAPI

    from service.recall.service import RecallService
    from service.settings import Settings

__all__ = [
    "EXIT_OK",
    "EXIT_PARTIAL",
    "EXIT_SERVER",
    "EXIT_USAGE",
    "CommandError",
    "app_from_environment",
    "build_parser",
    "main",
]

EXIT_OK: Final = 0
EXIT_USAGE: Final = 2
EXIT_SERVER: Final = 3
EXIT_PARTIAL: Final = 4

EXIT_CODES_HELP: Final = f"""\
exit codes:
  {EXIT_OK}  success
  {EXIT_USAGE}  usage error: unknown command or option, bad value, bad CUEBANK_* setting
  {EXIT_SERVER}  server or database error: port unavailable, database unreachable or not
     migrated, migration failed
  {EXIT_PARTIAL}  partial failure: the command did part of its job (see its message)
"""

#: How many ports after the requested one the demo tries before letting the system pick.
DEMO_PORT_ATTEMPTS: Final = 10
#: Fragments the demo tries, in one batch, to find an example the service recalls correctly.
DEMO_EXAMPLE_CANDIDATES: Final = 32


class CommandError(Exception):
    """A failure the command reports in one line and turns into an exit code."""

    def __init__(self, message: str, code: int = EXIT_SERVER) -> None:
        super().__init__(message)
        self.code = code


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error: the problem and where to read more, nothing else."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


def _port(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"port must be a number, got {text!r}") from None
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"port must be from 0 to 65535, got {value}")
    return value


def _workers(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"workers must be a number, got {text!r}") from None
    if not 1 <= value <= 64:
        raise argparse.ArgumentTypeError(f"workers must be from 1 to 64, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``cuebank`` and its subcommands."""
    parser = _Parser(
        prog="cuebank",
        description=textwrap.fill(
            "Cuebank: recall full records from fragments over HTTP, with a verdict "
            "(recalled, spurious or unsettled). Settings come from CUEBANK_* environment "
            "variables; the options of each command override them.",
            88,
        ),
        epilog=EXIT_CODES_HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    def command(name: str, summary: str, description: str) -> argparse.ArgumentParser:
        sub: argparse.ArgumentParser = commands.add_parser(
            name,
            help=summary,
            # Raw formatting keeps the exit-code table aligned, so the prose is wrapped here.
            description=textwrap.fill(description, 88),
            epilog=EXIT_CODES_HELP,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        return sub

    def data_dir_option(sub: argparse.ArgumentParser, what: str) -> None:
        sub.add_argument(
            "--data-dir",
            type=Path,
            metavar="DIR",
            help=f"directory of {what} (default: CUEBANK_DATA_DIR or ./cuebank-data)",
        )

    serve = command(
        "serve",
        "run the HTTP service",
        "Run the HTTP service with uvicorn (uvloop and httptools when installed). The "
        "database must already be migrated: run 'cuebank migrate' after every upgrade.",
    )
    serve.add_argument("--host", help="interface to listen on (default: CUEBANK_HOST or 127.0.0.1)")
    serve.add_argument(
        "--port", type=_port, help="TCP port to listen on (default: CUEBANK_PORT or 8000)"
    )
    serve.add_argument(
        "--workers",
        type=_workers,
        default=1,
        help="worker processes, 1 to 64 (default: 1); with several, use PostgreSQL "
        "(CUEBANK_DATABASE_URL) so the workers share one database server",
    )
    data_dir_option(serve, "the SQLite database when CUEBANK_DATABASE_URL is unset")

    migrate = command(
        "migrate",
        "upgrade the database schema to the newest version",
        "Apply every pending migration to the configured database (CUEBANK_DATABASE_URL, or "
        "the SQLite file in the data directory) and print the revision before and after. "
        "Safe to run again: a database already up to date is left alone.",
    )
    data_dir_option(migrate, "the SQLite database when CUEBANK_DATABASE_URL is unset")

    demo = command(
        "demo",
        "start the service with the demo specimen registry",
        "Migrate a SQLite database in the data directory, load the demo collection "
        "'specimens' (about 1,500 invented specimens of the Saltmarsh Point Field Station) if "
        "it is not there yet, print the service URL, the docs URL and an example request, and "
        "serve on 127.0.0.1. CUEBANK_DATABASE_URL is ignored: the demo always uses its own "
        "SQLite file.",
    )
    demo.add_argument(
        "--port",
        type=_port,
        default=8000,
        help="TCP port on 127.0.0.1 (default: 8000); when it is taken, the next free port is "
        "used and the message says so",
    )
    demo.add_argument(
        "--no-serve",
        action="store_true",
        help="load the demo and print the example request, then exit without serving",
    )
    data_dir_option(demo, "the demo's SQLite database")

    bench = command(
        "bench",
        "measure the engine against this machine's own ceiling",
        "Measure recall, compile, memory and growth of the engine, each against the best this "
        "machine does on the same shapes (a raw float32 GEMM, an exact nearest-neighbour "
        "pass, a Cholesky factorisation), and print the ratios with the targets they meet or "
        "miss. Sections: a/ceiling, b/recall, c/dense, d/http, e/compile, f/memory, g/growth. "
        "The HTTP section starts a server on 127.0.0.1 only. A full run takes a few minutes.",
    )
    bench.add_argument(
        "--quick",
        action="store_true",
        help="smaller sizes and fewer repeats: under a minute on 2 cores",
    )
    bench.add_argument(
        "--json",
        action="store_true",
        help="print one JSON document with every figure, the machine and the parameters "
        "instead of the tables",
    )
    bench.add_argument(
        "--sections",
        metavar="LIST",
        help="comma-separated sections to run, by letter or name, e.g. 'a,b,dense' (default: all)",
    )
    _add_key_parsers(command, data_dir_option)
    # The client-side commands (collection, import, recall, ...) live in their own module.
    from service.toolkit import add_parsers

    add_parsers(command)
    return parser


def _add_key_parsers(
    command: Callable[[str, str, str], argparse.ArgumentParser],
    data_dir_option: Callable[[argparse.ArgumentParser, str], None],
) -> None:
    """``cuebank team ...`` and ``cuebank key ...``: bootstrap keys directly on the database."""
    where = "the SQLite database when CUEBANK_DATABASE_URL is unset"
    team = command(
        "team",
        "create teams (directly on the database)",
        "Manage teams directly on the configured database, for bootstrapping: the HTTP API "
        "needs a key, and the first key of a team is made here.",
    )
    team_actions = team.add_subparsers(dest="action", metavar="ACTION", required=True)
    team_create = team_actions.add_parser("create", help="create a team")
    team_create.add_argument("name", help="team name: lower-case letters, digits, '-', '_'")
    data_dir_option(team_create, where)

    key = command(
        "key",
        "create, list and revoke API keys (directly on the database)",
        "Manage API keys directly on the configured database. A new key's secret is printed "
        "once and never stored: only its HMAC is kept. With PostgreSQL, set CUEBANK_KEY_PEPPER "
        "to the value the service uses.",
    )
    key_actions = key.add_subparsers(dest="action", metavar="ACTION", required=True)
    key_create = key_actions.add_parser("create", help="create a key and print its secret once")
    key_create.add_argument("--team", required=True, help="the team the key belongs to")
    key_create.add_argument(
        "--scopes",
        required=True,
        help="comma-separated scopes from read, write, admin, e.g. 'read,write'",
    )
    key_create.add_argument(
        "--expires-in-days", type=int, metavar="N", help="the key stops working after N days"
    )
    key_create.add_argument("--label", default="", help="a name to tell keys apart")
    data_dir_option(key_create, where)
    key_revoke = key_actions.add_parser("revoke", help="revoke a key by its prefix")
    key_revoke.add_argument("prefix", help="the key's prefix, e.g. cb_k3x9q2mf")
    data_dir_option(key_revoke, where)
    key_list = key_actions.add_parser("list", help="list a team's keys (never their secrets)")
    key_list.add_argument("--team", required=True, help="the team whose keys to list")
    data_dir_option(key_list, where)


def _settings(args: argparse.Namespace, **overrides: Any) -> Settings:
    from pydantic import ValidationError

    from service.settings import Settings

    for option in ("data_dir", "host", "port"):
        value = getattr(args, option, None)
        if value is not None:
            overrides[option] = value
    try:
        return Settings(**overrides)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(map(str, error['loc'])) or 'settings'}: {error['msg']}"
            for error in exc.errors()
        )
        raise CommandError(f"invalid settings: {problems}", EXIT_USAGE) from None


def _shown_url(url: str) -> str:
    from sqlalchemy.engine import make_url

    return make_url(url).render_as_string(hide_password=True)


def _database_errors() -> tuple[type[BaseException], ...]:
    from alembic.util import CommandError as AlembicError
    from sqlalchemy.exc import SQLAlchemyError

    return (SQLAlchemyError, AlembicError, OSError)


def _migrate(settings: Settings) -> tuple[str | None, str | None]:
    from service.storage.migrate import current_revision, upgrade_to_head

    url = settings.resolved_database_url
    try:
        before = current_revision(url)
        upgrade_to_head(url)
        after = current_revision(url)
    except _database_errors() as exc:
        raise CommandError(f"cannot migrate {_shown_url(url)}: {exc}") from None
    return before, after


def run_migrate(args: argparse.Namespace) -> int:
    settings = _settings(args)
    before, after = _migrate(settings)
    where = _shown_url(settings.resolved_database_url)
    if before == after:
        print(f"{where}: already at {after}, nothing to do")
    else:
        print(f"{where}: migrated {before or 'empty database'} -> {after}")
    return EXIT_OK


def _server_options() -> dict[str, Any]:
    # uvloop and httptools are optional C speed-ups (uvicorn[standard] installs them where
    # wheels exist); the pure-Python fallbacks behave the same, only slower.
    return {
        "loop": "uvloop" if importlib.util.find_spec("uvloop") else "asyncio",
        "http": "httptools" if importlib.util.find_spec("httptools") else "h11",
        # A service behind a proxy should not advertise its server software.
        "server_header": False,
        "timeout_graceful_shutdown": 10,
    }


def app_from_environment() -> FastAPI:
    """App factory for worker processes: each builds its app from CUEBANK_* variables."""
    from service.api.app import create_app
    from service.api.logs import configure_logging
    from service.settings import get_settings

    settings = get_settings()
    configure_logging(settings.log_level)
    return create_app(settings)


def _bind(host: str, port: int) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        # Same as uvicorn: a restart right after a stop must not wait out TIME_WAIT.
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, port))
        sock.listen(2048)
    except OSError:
        sock.close()
        raise
    sock.set_inheritable(True)
    return sock


def _run_server(
    app: FastAPI, sock: socket.socket, settings: Settings, *, started: Any = None
) -> int:
    """Serve ``app`` on ``sock`` until stopped; ``started`` (an event), when given, is set
    once the server serves."""
    import uvicorn

    from service.api.logs import configure_logging

    host, port = sock.getsockname()[:2]
    configure_logging(settings.log_level)
    config = uvicorn.Config(
        app,
        host=host,
        port=port,
        log_level=settings.log_level.lower(),
        # The app writes one JSON access line per request itself (service/api/logs.py); the
        # server's own line would repeat the raw path, which can hold memory keys.
        access_log=False,
        log_config=None,
        **_server_options(),
    )
    server = uvicorn.Server(config)
    if started is not None:
        _report_started(server, started)
    try:
        server.run(sockets=[sock])
    finally:
        sock.close()
    if not server.started:
        raise CommandError("the server did not start; see the log above for the reason")
    return EXIT_OK


def _report_started(server: Any, started: Any) -> None:
    """Set ``started`` once ``server`` has finished its start-up, from a daemon thread."""
    import threading

    def watch() -> None:
        while not server.should_exit:
            if server.started:
                started.set()
                return
            time.sleep(0.05)

    threading.Thread(target=watch, name="cuebank-started", daemon=True).start()


def _require_migrated(settings: Settings) -> None:
    from service.storage.migrate import current_revision, head_revision

    url = settings.resolved_database_url
    try:
        current = current_revision(url)
    except _database_errors() as exc:
        raise CommandError(f"cannot open the database {_shown_url(url)}: {exc}") from None
    head = head_revision()
    if current != head:
        raise CommandError(
            f"the database {_shown_url(url)} is at {current or 'no revision'}, the code needs "
            f"{head}; run 'cuebank migrate' first"
        )


def run_serve(args: argparse.Namespace) -> int:
    settings = _settings(args)
    _require_migrated(settings)
    if args.workers == 1:
        from service.api.app import create_app

        try:
            sock = _bind(settings.host, settings.port)
        except OSError as exc:
            raise CommandError(f"cannot listen on {settings.host}:{settings.port}: {exc}") from None
        return _run_server(create_app(settings), sock, settings)

    # Worker processes build their own settings from the environment, so the command-line
    # overrides travel there too.
    for option, variable in (("data_dir", "CUEBANK_DATA_DIR"), ("host", "CUEBANK_HOST")):
        if getattr(args, option) is not None:
            os.environ[variable] = str(getattr(args, option))
    if args.port is not None:
        os.environ["CUEBANK_PORT"] = str(args.port)
    if settings.database_url is None:
        print(
            "note: several workers on SQLite serialise every write; "
            "set CUEBANK_DATABASE_URL to a PostgreSQL database for real concurrency",
            file=sys.stderr,
        )
    try:
        _bind(settings.host, settings.port).close()
    except OSError as exc:
        raise CommandError(f"cannot listen on {settings.host}:{settings.port}: {exc}") from None
    from service.workers import WorkerPool, spreads_connections

    if spreads_connections():
        # a socket per worker, so the kernel spreads the connections (see service.workers)
        pool = WorkerPool(
            args.workers,
            _serve_worker,
            (settings.host, settings.port),
            stop_seconds=float(_server_options()["timeout_graceful_shutdown"]) + 5.0,
        )
        if pool.run() != 0:
            raise CommandError("a worker stopped during start-up; see the log above")
        return EXIT_OK
    import uvicorn

    try:
        uvicorn.run(
            "service.cli:app_from_environment",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=args.workers,
            log_level=settings.log_level.lower(),
            access_log=False,
            log_config=None,
            **_server_options(),
        )
    except SystemExit as exc:
        if exc.code not in (None, 0):
            raise CommandError("the server stopped with an error; see the log above") from None
    return EXIT_OK


def _serve_worker(started: Any, host: str, port: int) -> None:
    """One worker of ``cuebank serve --workers N``: the app on a socket of its own.

    Runs in a spawned process; ``started`` (an event) is set once the server serves.
    """
    from service.api.app import create_app
    from service.settings import get_settings
    from service.workers import reuse_port_socket

    settings = get_settings()  # from CUEBANK_*, which run_serve set for the workers
    sock = reuse_port_socket(host, port, listen=False)  # the server listens once it is ready
    try:
        code = _run_server(create_app(settings), sock, settings, started=started)
    except CommandError as exc:
        print(f"cuebank serve: {exc}", file=sys.stderr)
        code = exc.code
    sys.exit(code)


def _demo_socket(port: int) -> tuple[socket.socket, str | None]:
    """Listen on 127.0.0.1:``port``, or the next free port; say why when it is not ``port``."""
    tried: list[int] = []
    candidates = [port + i for i in range(DEMO_PORT_ATTEMPTS) if port + i <= 65535] or [port]
    if port == 0:
        candidates = [0]
    for candidate in [*candidates, 0]:
        try:
            sock = _bind("127.0.0.1", candidate)
        except OSError as exc:
            if exc.errno not in (errno.EADDRINUSE, errno.EACCES):
                raise CommandError(f"cannot listen on 127.0.0.1:{candidate}: {exc}") from None
            tried.append(candidate)
            continue
        if not tried:
            return sock, None
        chosen = sock.getsockname()[1]
        shown = ", ".join(map(str, tried[:3])) + (" ..." if len(tried) > 3 else "")
        return sock, f"port {shown} is taken (another program is listening); using {chosen}"
    raise CommandError(f"no free port on 127.0.0.1 (tried {port} and the next ones)")


def _example_cue(service: RecallService) -> tuple[str, dict[str, Any], bool]:
    """A smudged fragment of a demo specimen and whether the service recalls it correctly."""
    from service.demo import DEMO_COLLECTION, demo_records, example_fragment
    from service.recall.errors import ServiceError
    from service.recall.models import RecallOptions
    from service.recall.service import DEFAULT_TEAM

    fragments = example_fragment(demo_records())
    batch = [next(fragments) for _ in range(DEMO_EXAMPLE_CANDIDATES)]
    try:
        results = service.recall(
            DEFAULT_TEAM, DEMO_COLLECTION, [cue for _, cue in batch], RecallOptions()
        )
    except ServiceError as exc:
        print(f"warning: the example recall failed: {exc}", file=sys.stderr)
        return batch[0][0], dict(batch[0][1]), False
    for (key, cue), result in zip(batch, results, strict=True):
        if result.verdict == "recalled" and result.memory and result.memory.key == key:
            return key, dict(cue), True
    return batch[0][0], dict(batch[0][1]), False


#: Label of the demo's key: each demo run revokes the live key carrying it and makes a new one.
DEMO_KEY_LABEL: Final = "demo"


def _prepare_demo(settings: Settings) -> tuple[str, dict[str, Any], bool, bool, str]:
    from service.demo import load_demo
    from service.recall.auth import KeyService, load_pepper
    from service.recall.service import DEFAULT_TEAM, RecallService
    from service.storage.db import make_engine, make_session_factory

    before, after = _migrate(settings)
    if before != after:
        print(f"database {settings.resolved_database_url}: migrated to {after}")
    engine = make_engine(
        settings.resolved_database_url, sqlite_synchronous=settings.sqlite_synchronous
    )
    try:
        service = RecallService(settings, make_session_factory(engine))
        try:
            loaded = load_demo(service)
            key, cue, verified = _example_cue(service)
            # A fresh key per run, the previous one revoked: the demo can always show a working
            # key while only its hash is ever stored.
            keys = KeyService(settings, make_session_factory(engine), load_pepper(settings))
            keys.ensure_team(DEFAULT_TEAM)
            _, secret = keys.replace_labelled_key(
                DEFAULT_TEAM, DEMO_KEY_LABEL, ("read", "write", "admin")
            )
        except _database_errors() as exc:
            raise CommandError(f"cannot load the demo: {exc}") from None
    finally:
        engine.dispose()
    return key, cue, verified, loaded, secret


def curl_example(base_url: str, collection: str, cue: dict[str, Any], api_key: str) -> str:
    """A copy-pasteable curl command recalling ``cue`` from ``collection`` with ``api_key``.

    Examples
    --------
    >>> print(curl_example("http://127.0.0.1:8000", "specimens", {"site_code": "SMP-M1"}, "cb_x"))
    curl -s -X POST http://127.0.0.1:8000/v1/collections/specimens/recall \\
      -H 'Authorization: Bearer cb_x' \\
      -H 'Content-Type: application/json' \\
      -d '{"cue": {"site_code": "SMP-M1"}}'
    """
    body = json.dumps({"cue": cue}, ensure_ascii=False)
    return (
        f"curl -s -X POST {base_url}/v1/collections/{collection}/recall \\\n"
        f"  -H {shlex.quote('Authorization: Bearer ' + api_key)} \\\n"
        f"  -H 'Content-Type: application/json' \\\n"
        f"  -d {shlex.quote(body)}"
    )


def run_demo(args: argparse.Namespace) -> int:
    from service.demo import DEMO_COLLECTION, demo_records, describe_fragment

    # The demo never touches a configured production database.
    settings = _settings(args, database_url=None)
    print(f"preparing the demo in {settings.data_dir.expanduser().absolute()} ...", flush=True)
    key, cue, verified, loaded, secret = _prepare_demo(settings)
    print(
        f"collection '{DEMO_COLLECTION}': "
        + ("loaded the demo specimens" if loaded else "already there, left as it is")
    )
    sock: socket.socket | None = None
    port = args.port
    if not args.no_serve:
        sock, note = _demo_socket(args.port)
        port = sock.getsockname()[1]
        if note:
            print(note)
    base = f"http://127.0.0.1:{port}"
    print()
    print(f"  service:  {base}")
    print(f"  API docs: {base}/docs")
    print(f"  API key:  {secret}")
    print(
        "            (admin key of the demo team; only its hash is stored, so each demo run "
        "makes a new one and revokes the last)"
    )
    print()
    record = dict(demo_records())[key]
    print(f"Recall specimen {key} from a smudged label ({describe_fragment(record, cue)}):")
    print()
    print(curl_example(base, DEMO_COLLECTION, cue, secret))
    print()
    if not verified:
        print(
            "warning: this example was not recalled correctly when checked just now",
            file=sys.stderr,
        )
    if sock is None:
        return EXIT_OK if verified else EXIT_PARTIAL
    from service.api.app import create_app

    print("Press Ctrl+C to stop.", flush=True)
    # the demo's first recall should not wait for the compile
    served = settings.model_copy(update={"warm_on_start": True})
    return _run_server(create_app(served), sock, served)


def _key_service(settings: Settings) -> tuple[Any, Callable[[], None]]:
    """A key service on the configured database, and the function that closes it."""
    from service.recall.auth import KeyService, PepperMissing, load_pepper
    from service.storage.db import make_engine, make_session_factory

    _require_migrated(settings)
    try:
        pepper = load_pepper(settings)
    except (PepperMissing, OSError) as exc:
        raise CommandError(str(exc), EXIT_USAGE) from None
    engine = make_engine(
        settings.resolved_database_url, sqlite_synchronous=settings.sqlite_synchronous
    )
    return KeyService(settings, make_session_factory(engine), pepper), engine.dispose


def _when(value: Any) -> str:
    return value.isoformat(timespec="seconds") if value is not None else "-"


def run_team(args: argparse.Namespace) -> int:
    from service.recall.errors import ServiceError

    keys, close = _key_service(_settings(args))
    try:
        keys.create_team(args.name)
    except ServiceError as exc:
        raise CommandError(str(exc), EXIT_USAGE) from None
    finally:
        close()
    print(f"team '{args.name}' created; make its first key with:")
    print(f"  cuebank key create --team {args.name} --scopes read,write,admin")
    return EXIT_OK


def run_key(args: argparse.Namespace) -> int:
    from service.recall.errors import ServiceError

    keys, close = _key_service(_settings(args))
    try:
        if args.action == "create":
            info, secret = keys.create_key(
                args.team,
                args.scopes.split(","),
                label=args.label,
                expires_in_days=args.expires_in_days,
            )
            expiry = f", expires {_when(info.expires_at)}" if info.expires_at else ""
            print(f"key {info.prefix} for team '{info.team}' ({','.join(info.scopes)}{expiry})")
            print("secret (shown once, store it now; send as 'Authorization: Bearer <secret>'):")
            print(secret)
        elif args.action == "revoke":
            info = keys.revoke_key(args.prefix, team=None)
            print(f"key {info.prefix} of team '{info.team}' revoked")
        else:
            print(f"{'PREFIX':<12} {'STATE':<8} {'SCOPES':<17} {'EXPIRES':<26} LABEL")
            for info in keys.list_keys(args.team):
                print(
                    f"{info.prefix:<12} {info.state:<8} {','.join(info.scopes):<17} "
                    f"{_when(info.expires_at):<26} {info.label}"
                )
    except ServiceError as exc:
        raise CommandError(str(exc), EXIT_USAGE) from None
    finally:
        close()
    return EXIT_OK


def _set_blas_threads() -> str:
    """Fix the BLAS thread count for this process; say what is in effect and why."""
    if "numpy" in sys.modules:
        # BLAS reads these variables when it loads, so it is too late to change them.
        return "numpy was already imported; the BLAS default or the environment decides"
    variables = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
    preset = [v for v in variables if os.environ.get(v)]
    if preset:
        return f"set by the environment ({', '.join(f'{v}={os.environ[v]}' for v in preset)})"
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        usable = os.cpu_count() or 1
    for variable in variables:
        os.environ[variable] = str(usable)
    return f"set to the {usable} usable CPUs before numpy was imported"


def run_bench(args: argparse.Namespace) -> int:
    note = _set_blas_threads()
    from service.bench import format_report, parse_sections
    from service.bench import run_bench as bench

    try:
        sections = parse_sections(args.sections)
    except ValueError as exc:
        raise CommandError(str(exc), EXIT_USAGE) from None

    def progress(message: str) -> None:
        print(message, file=sys.stderr, flush=True)

    doc = bench(sections, quick=args.quick, thread_note=note, progress=progress)
    if args.json:
        print(json.dumps(doc, indent=2, default=str))
    else:
        print(format_report(doc))
    return EXIT_OK


_COMMANDS: Final[dict[str, Callable[[argparse.Namespace], int]]] = {
    "serve": run_serve,
    "migrate": run_migrate,
    "demo": run_demo,
    "bench": run_bench,
    "team": run_team,
    "key": run_key,
}


def _command(name: str) -> Callable[[argparse.Namespace], int]:
    from service.toolkit import COMMANDS

    return _COMMANDS.get(name) or COMMANDS[name]


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``cuebank`` console script; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        return _command(args.command)(args)
    except CommandError as exc:
        print(f"cuebank {args.command}: error: {exc}", file=sys.stderr)
        return exc.code
    except KeyboardInterrupt:
        return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
