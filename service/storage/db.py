"""Engines, sessions and the unit of work.

Nothing here connects at import time: callers build an engine from settings when the app (or a
command, or a test) starts, and dispose of it when it stops.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Literal

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import URL, Connection, make_url
from sqlalchemy.orm import Session, sessionmaker
from sqlalchemy.pool import ConnectionPoolEntry

__all__ = [
    "SQLITE_BUSY_TIMEOUT_MS",
    "WRITE_OPTION",
    "SessionFactory",
    "make_engine",
    "make_session_factory",
    "read_connection",
    "unit_of_work",
]

#: Execution option that marks a connection as about to write; on SQLite it selects
#: ``BEGIN IMMEDIATE``.
WRITE_OPTION = "cuebank_write"

#: How long a SQLite connection waits for another writer before failing with "database is
#: locked". Writers hold the lock only for one short unit of work, so ten seconds means
#: something is wrong rather than merely busy.
SQLITE_BUSY_TIMEOUT_MS = 10_000

SessionFactory = sessionmaker[Session]


def _sqlite_file(url: URL) -> Path | None:
    database = url.database
    if not database or database == ":memory:" or database.startswith("file:"):
        return None
    return Path(database)


def _install_sqlite_hooks(
    engine: Engine, *, synchronous: Literal["FULL", "NORMAL"], foreign_keys: bool
) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: ConnectionPoolEntry) -> None:
        # Take BEGIN away from the sqlite3 driver (SQLAlchemy's documented pysqlite recipe):
        # the driver's legacy handling starts transactions lazily at the first write, so a
        # read-then-write unit of work reads outside any lock and two writers silently overwrite
        # each other's updates.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
            cursor.execute(f"PRAGMA foreign_keys={'ON' if foreign_keys else 'OFF'}")
            cursor.execute(f"PRAGMA synchronous={synchronous}")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection: Connection) -> None:
        # IMMEDIATE takes the write lock up front, so the reads of a write unit of work see the
        # state its writes apply to; waiting for the lock is bounded by busy_timeout. Read-only
        # units keep a plain (deferred) BEGIN so they never block writers under WAL.
        if connection.get_execution_options().get(WRITE_OPTION, False):
            connection.exec_driver_sql("BEGIN IMMEDIATE")
        else:
            connection.exec_driver_sql("BEGIN")


def make_engine(
    url: str,
    *,
    sqlite_synchronous: Literal["FULL", "NORMAL"] = "FULL",
    sqlite_foreign_keys: bool = True,
) -> Engine:
    """Build an engine for ``url`` with Cuebank's connection settings.

    SQLite gets WAL mode, a busy timeout, foreign keys on and the requested ``synchronous``
    level on every new connection, and ``BEGIN IMMEDIATE`` for units of work marked as writes.
    The directory of a SQLite file is created if missing. PostgreSQL connections are checked
    before use, so a restarted server costs one reconnect rather than a failed request.

    ``sqlite_foreign_keys=False`` exists for migrations only: SQLite rebuilds a table to alter
    it, and dropping the old copy with foreign keys on would cascade-delete the child rows.
    """
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        path = _sqlite_file(parsed)
        if path is not None:
            path.parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(parsed)
        _install_sqlite_hooks(
            engine, synchronous=sqlite_synchronous, foreign_keys=sqlite_foreign_keys
        )
        return engine
    return create_engine(parsed, pool_pre_ping=True)


def make_session_factory(engine: Engine) -> SessionFactory:
    """A session factory bound to ``engine``.

    Objects stay readable after commit (``expire_on_commit=False``): the API layer turns them
    into responses after the unit of work has closed, and reloading them would cost a query
    each and could fail once the session is gone.
    """
    return sessionmaker(bind=engine, expire_on_commit=False, autoflush=True)


@contextmanager
def unit_of_work(factory: SessionFactory, *, write: bool) -> Iterator[Session]:
    """Yield a session whose transaction commits on success and rolls back on any exception.

    ``write=True`` must be used whenever the unit may write: on SQLite it starts the
    transaction with ``BEGIN IMMEDIATE`` so concurrent read-then-write units serialise instead
    of losing updates. Repositories only flush; committing is this function's job.
    """
    with factory() as session:
        if write:
            # Opening the connection now, with the flag, is what makes the begin hook see it.
            session.connection(execution_options={WRITE_OPTION: True})
        try:
            yield session
        except BaseException:
            session.rollback()
            raise
        session.commit()


@contextmanager
def read_connection(factory: SessionFactory) -> Iterator[Connection]:
    """A plain connection for one small read, without an ORM session (a third of the cost).

    For the per-request checks on the recall path; anything that loads objects or writes uses
    :func:`unit_of_work`.
    """
    engine: Engine = factory.kw["bind"]
    with engine.connect() as connection:
        yield connection
