"""All database queries of the service, one repository per table.

Repositories flush but never commit: the caller's unit of work
(:func:`service.storage.db.unit_of_work`) decides when a transaction ends.
"""

from __future__ import annotations

import builtins
import json
import threading
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple, NoReturn, cast

from sqlalchemy import (
    Connection,
    CursorResult,
    Engine,
    Table,
    bindparam,
    delete,
    event,
    func,
    select,
    update,
)
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session
from sqlalchemy.orm.util import identity_key
from sqlalchemy.pool import QueuePool

from service.storage.errors import DuplicateNameError, NotFoundError, StorageError
from service.storage.models import Collection, CompileReport, Memory, Team, utcnow

__all__ = [
    "DEFAULT_TEAM_NAME",
    "BulkPutCounts",
    "CollectionRepository",
    "CollectionRevision",
    "CompileReportRepository",
    "MemoryPage",
    "MemoryRepository",
    "RevisionReader",
    "TeamRepository",
    "collection_revision",
]

#: The team every collection belongs to until keys and teams are managed through the API.
DEFAULT_TEAM_NAME = "default"

# Stays below SQLite's oldest bound-parameter limit (999) whatever the row width.
_IN_CHUNK = 500
_UPSERT_CHUNK = 150


def _table(model: type[Collection] | type[Memory]) -> Table:
    table = model.__table__
    if not isinstance(table, Table):  # pragma: no cover - declarative models map to tables
        raise TypeError(f"{model.__name__} is not mapped to a table")
    return table


def _rowcount(result: Any) -> int:
    # Session.execute is typed as returning a plain Result; DML statements give a
    # CursorResult, which carries the number of matched rows.
    return cast("CursorResult[Any]", result).rowcount


class TeamRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def get(self, team_id: int) -> Team | None:
        return self.session.get(Team, team_id)

    def get_by_name(self, name: str) -> Team | None:
        return self.session.scalars(select(Team).where(Team.name == name)).one_or_none()

    def create(self, name: str) -> Team:
        """Insert a team; :class:`DuplicateNameError` if the name is taken."""
        team = Team(name=name)
        try:
            # The savepoint keeps the caller's transaction usable after a clash.
            with self.session.begin_nested():
                self.session.add(team)
        except IntegrityError as exc:
            raise DuplicateNameError("team", name) from exc
        return team

    def get_or_create_default(self) -> Team:
        """The default team, created on first use (safe against a concurrent first use)."""
        team = self.get_by_name(DEFAULT_TEAM_NAME)
        if team is not None:
            return team
        try:
            return self.create(DEFAULT_TEAM_NAME)
        except DuplicateNameError:
            team = self.get_by_name(DEFAULT_TEAM_NAME)
            if team is None:  # pragma: no cover - the clash proves the row exists
                raise
            return team


class CollectionRevision(NamedTuple):
    id: int
    revision: int
    verdict_options: dict[str, Any]


#: Built once: constructing a select and deriving its cache key each call cost more than
#: running it.
_REVISION_QUERY = (
    select(Collection.id, Collection.revision, Collection.verdict_options)
    .join(Team, Team.id == Collection.team_id)
    .where(Team.name == bindparam("team"), Collection.name == bindparam("name"))
)


def collection_revision(connection: Connection, team: str, name: str) -> CollectionRevision | None:
    """Id, revision and verdict options of team ``team``'s collection ``name`` in one query.

    The recall path's check that its compiled memory is current: Core only, one round trip,
    so it stays cheap enough to run on every recall.
    """
    row = connection.execute(_REVISION_QUERY, {"team": team, "name": name}).one_or_none()
    if row is None:
        return None
    return CollectionRevision(int(row[0]), int(row[1]), dict(row[2] or {}))


class RevisionReader:
    """:func:`collection_revision` in one statement on a connection each thread keeps open.

    The recall path reads the revision on every run. Through the pool that is a checkout (on
    PostgreSQL with its liveness ping), a ``BEGIN``, the query, a rollback and the Core
    machinery around each: about 70 µs on SQLite at best and several times that under load,
    a third of a small run. Here each calling thread keeps a connection of its own outside
    the pool, in autocommit (so every read sees the latest commit of any worker, as before),
    and runs the query text compiled once: a few µs on SQLite, one round trip on
    PostgreSQL.

    Any driver error closes the thread's connection and answers through the pool instead,
    which reconnects, or raises the error the app turns into a 503. Engines whose pool is not
    a :class:`~sqlalchemy.pool.QueuePool` (an in-memory SQLite database is one connection
    shared by all) always go through the pool. The connections are closed when the engine is
    disposed, or when their thread is found to have ended.
    """

    def __init__(self, engine: Engine) -> None:
        self._engine = engine
        self._enabled = type(engine.pool) is QueuePool
        compiled = _REVISION_QUERY.compile(dialect=engine.dialect)
        self._sql = str(compiled)
        self._order = tuple(compiled.positiontup or ()) if compiled.positional else None
        self._lock = threading.Lock()
        self._held: dict[threading.Thread, Any] = {}  # each thread's connection
        self._parsed: dict[str | bytes, Any] = {}  # verdict options text -> its value
        self.opened = 0  # connections opened, for the tests
        if self._enabled:
            event.listen(engine, "engine_disposed", self._on_dispose)

    def read(self, team: str, name: str) -> CollectionRevision | None:
        """Id, revision and verdict options of ``team``'s collection ``name``, or None."""
        if self._enabled:
            connection = self._held.get(threading.current_thread())
            try:
                if connection is None:
                    connection = self._open()
                row = self._fetch(connection, team, name)
            except Exception as exc:  # the driver's own errors: start again through the pool
                if not isinstance(exc, self._engine.dialect.loaded_dbapi.Error):
                    raise
                self._drop()
            else:
                if row is None:
                    return None
                options = row[2]
                if isinstance(options, str | bytes):  # SQLite hands back the JSON text
                    parsed = self._parsed.get(options)
                    if parsed is None:
                        if len(self._parsed) >= 256:
                            self._parsed.clear()
                        parsed = self._parsed[options] = json.loads(options)
                    options = parsed
                return CollectionRevision(int(row[0]), int(row[1]), dict(options or {}))
        with self._engine.connect() as pooled:
            return collection_revision(pooled, team, name)

    def _fetch(self, connection: Any, team: str, name: str) -> Any:
        params = {"team": team, "name": name}
        cursor = connection.cursor()
        try:
            cursor.execute(
                self._sql,
                params if self._order is None else tuple(params[k] for k in self._order),
            )
            return cursor.fetchone()
        finally:
            cursor.close()

    def _open(self) -> Any:
        pooled = self._engine.raw_connection()  # runs the engine's connect hooks
        try:
            connection = pooled.dbapi_connection
            if connection is None:  # pragma: no cover - a checked-out connection has one
                raise RuntimeError("the pool gave a connection without a driver connection")
            pooled.rollback()  # a liveness ping may have opened a transaction
            self._engine.dialect.set_isolation_level(connection, "AUTOCOMMIT")
            pooled.detach()  # ours now: the pool opens another in its place when it must
        except BaseException:
            pooled.invalidate()
            pooled.close()
            raise
        with self._lock:
            for thread in [t for t in self._held if not t.is_alive()]:
                _close_quietly(self._held.pop(thread))
            self._held[threading.current_thread()] = connection
            self.opened += 1
        return connection

    def _drop(self) -> None:
        with self._lock:
            connection = self._held.pop(threading.current_thread(), None)
        if connection is not None:
            _close_quietly(connection)

    def _on_dispose(self, _engine: Engine) -> None:
        with self._lock:
            held, self._held = list(self._held.values()), {}
        for connection in held:
            _close_quietly(connection)


def _close_quietly(connection: Any) -> None:
    try:
        connection.close()
    except Exception:  # pragma: no cover - a broken connection may refuse to close
        pass


class CollectionRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def create(
        self,
        team_id: int,
        name: str,
        *,
        schema: dict[str, Any],
        rule: str,
        rule_options: dict[str, Any],
        verdict_options: dict[str, Any],
        seed: int,
        description: str = "",
    ) -> Collection:
        """Insert a collection; :class:`DuplicateNameError` if the team already has the name."""
        collection = Collection(
            team_id=team_id,
            name=name,
            description=description,
            schema=schema,
            rule=rule,
            rule_options=rule_options,
            verdict_options=verdict_options,
            seed=seed,
            revision=0,
        )
        try:
            with self.session.begin_nested():
                self.session.add(collection)
        except IntegrityError as exc:
            self._raise_for(exc, team_id, name, exclude_id=None)
        return collection

    def get(self, team_id: int, name: str, *, for_update: bool = False) -> Collection | None:
        """The team's collection called ``name``, or None.

        ``for_update=True`` locks the row until the transaction ends on PostgreSQL, so
        concurrent writers to one collection take turns; SQLite's ``BEGIN IMMEDIATE`` already
        serialises all writers, and the clause is left out there.
        """
        stmt = select(Collection).where(Collection.team_id == team_id, Collection.name == name)
        if for_update:
            stmt = stmt.with_for_update()
        return self.session.scalars(stmt).one_or_none()

    def get_by_id(self, collection_id: int) -> Collection | None:
        return self.session.get(Collection, collection_id)

    def list(self, team_id: int) -> builtins.list[Collection]:
        """The team's collections ordered by name."""
        stmt = select(Collection).where(Collection.team_id == team_id).order_by(Collection.name)
        return builtins.list(self.session.scalars(stmt))

    def list_all(self) -> builtins.list[Collection]:
        """Every team's collections, for maintenance such as warming caches."""
        stmt = select(Collection).order_by(Collection.team_id, Collection.name)
        return builtins.list(self.session.scalars(stmt))

    def update(
        self,
        collection: Collection,
        *,
        name: str | None = None,
        description: str | None = None,
        schema: dict[str, Any] | None = None,
        rule: str | None = None,
        rule_options: dict[str, Any] | None = None,
        verdict_options: dict[str, Any] | None = None,
    ) -> Collection:
        """Change the given attributes (None leaves one as it is).

        A change to anything that shapes compiled weights or verdicts (schema, rule, options)
        also bumps the revision, so every worker's cached compilation goes stale by the same
        check it uses for changed memories. Renaming onto a taken name raises
        :class:`DuplicateNameError`.
        """
        changes: dict[str, Any] = {}
        recompile = False
        for attribute, value in (
            ("schema", schema),
            ("rule", rule),
            ("rule_options", rule_options),
            ("verdict_options", verdict_options),
        ):
            if value is not None and value != getattr(collection, attribute):
                changes[attribute] = value
                recompile = True
        if description is not None and description != collection.description:
            changes["description"] = description
        if name is not None and name != collection.name:
            changes["name"] = name
        if not changes:
            return collection
        team_id, new_name = collection.team_id, changes.get("name", collection.name)
        try:
            # Changes are applied inside the savepoint: begin_nested() flushes whatever is
            # pending first, and a clash raised there would spoil the caller's transaction.
            with self.session.begin_nested():
                for attribute, value in changes.items():
                    setattr(collection, attribute, value)
        except IntegrityError as exc:
            self._raise_for(exc, team_id, new_name, exclude_id=collection.id)
        if recompile:
            self.bump_revision(collection.id)
        return collection

    def delete(self, collection_id: int) -> bool:
        """Delete a collection with its memories and reports; False if it did not exist."""
        result = self.session.execute(delete(Collection).where(Collection.id == collection_id))
        return _rowcount(result) > 0

    def bump_revision(self, collection_id: int) -> int:
        """Increment the revision in SQL and return the new value.

        The increment happens inside the database so two writers can never both read n and
        write n + 1; the row stays locked until the transaction ends.
        """
        table = _table(Collection)
        stmt = (
            update(table)
            .where(table.c.id == collection_id)
            .values(revision=table.c.revision + 1, updated_at=utcnow())
            .returning(table.c.revision)
        )
        revision = self.session.execute(stmt).scalar_one_or_none()
        if revision is None:
            raise NotFoundError("collection", collection_id)
        self._expire_loaded(collection_id, "revision", "updated_at")
        return int(revision)

    def revision(self, collection_id: int) -> int:
        """The current revision, read straight from the database (one indexed row)."""
        table = _table(Collection)
        stmt = select(table.c.revision).where(table.c.id == collection_id)
        revision = self.session.execute(stmt).scalar_one_or_none()
        if revision is None:
            raise NotFoundError("collection", collection_id)
        return int(revision)

    def _expire_loaded(self, collection_id: int, *attributes: str) -> None:
        # A Core UPDATE bypasses the identity map; without this a loaded object would keep
        # showing the old revision for the rest of the unit of work.
        loaded = self.session.identity_map.get(identity_key(Collection, collection_id))
        if loaded is not None:
            self.session.expire(loaded, builtins.list(attributes))

    def _raise_for(
        self, exc: IntegrityError, team_id: int, name: str, *, exclude_id: int | None
    ) -> NoReturn:
        # The constraint that failed is not portable to read from the driver error, so look
        # for the clash itself; anything else (a missing team, say) is a generic failure.
        stmt = select(Collection.id).where(Collection.team_id == team_id, Collection.name == name)
        if exclude_id is not None:
            stmt = stmt.where(Collection.id != exclude_id)
        if self.session.scalars(stmt).first() is not None:
            raise DuplicateNameError("collection", name) from exc
        raise StorageError(f"could not store collection {name!r}: {exc.orig}") from exc


@dataclass(frozen=True, slots=True)
class MemoryPage:
    """One keyset page of memories; ``next_after`` is the cursor of the next page, if any."""

    items: list[Memory]
    next_after: str | None


class BulkPutCounts(NamedTuple):
    created: int
    replaced: int


class MemoryRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def get(self, collection_id: int, key: str) -> Memory | None:
        stmt = select(Memory).where(Memory.collection_id == collection_id, Memory.key == key)
        return self.session.scalars(stmt).one_or_none()

    def put(self, collection_id: int, key: str, fields: dict[str, Any]) -> bool:
        """Insert or replace one memory; True if it was created, False if replaced."""
        memory = self.get(collection_id, key)
        if memory is not None:
            self._replace(memory, fields)
            return False
        memory = Memory(collection_id=collection_id, key=key, fields=fields)
        try:
            with self.session.begin_nested():
                self.session.add(memory)
        except IntegrityError:
            # Another transaction inserted the key between our read and our insert (possible
            # on PostgreSQL under READ COMMITTED): that row is now the one to replace.
            existing = self.get(collection_id, key)
            if existing is None:
                raise
            self._replace(existing, fields)
            return False
        return True

    def _replace(self, memory: Memory, fields: dict[str, Any]) -> None:
        memory.fields = fields
        # Set explicitly: onupdate does not fire when the new fields equal the old ones, and a
        # put is a write the caller asked for.
        memory.updated_at = utcnow()
        self.session.flush()

    def delete(self, collection_id: int, key: str) -> bool:
        """Delete one memory; False if there was none."""
        stmt = delete(Memory).where(Memory.collection_id == collection_id, Memory.key == key)
        return _rowcount(self.session.execute(stmt)) > 0

    def count(self, collection_id: int) -> int:
        stmt = select(func.count()).select_from(Memory).where(Memory.collection_id == collection_id)
        return int(self.session.execute(stmt).scalar_one())

    def page(self, collection_id: int, after_key: str | None, limit: int) -> MemoryPage:
        """Up to ``limit`` memories with keys after ``after_key``, ordered by key."""
        if limit < 1:
            raise ValueError(f"limit is {limit}, below 1")
        stmt = select(Memory).where(Memory.collection_id == collection_id)
        if after_key is not None:
            stmt = stmt.where(Memory.key > after_key)
        # One row more than asked tells whether another page exists without a count query.
        stmt = stmt.order_by(Memory.key).limit(limit + 1)
        rows = builtins.list(self.session.scalars(stmt))
        if len(rows) > limit:
            return MemoryPage(items=rows[:limit], next_after=rows[limit - 1].key)
        return MemoryPage(items=rows, next_after=None)

    def all_ordered(self, collection_id: int) -> list[tuple[str, dict[str, Any]]]:
        """Every memory as (key, fields), ordered by key: the input of a compilation."""
        stmt = (
            select(Memory.key, Memory.fields)
            .where(Memory.collection_id == collection_id)
            .order_by(Memory.key)
        )
        return [(key, fields) for key, fields in self.session.execute(stmt)]

    def keys_existing(self, collection_id: int, keys: Iterable[str]) -> set[str]:
        """The subset of ``keys`` stored in the collection."""
        wanted = builtins.list(dict.fromkeys(keys))
        found: set[str] = set()
        for start in range(0, len(wanted), _IN_CHUNK):
            chunk = wanted[start : start + _IN_CHUNK]
            stmt = select(Memory.key).where(
                Memory.collection_id == collection_id, Memory.key.in_(chunk)
            )
            found.update(self.session.scalars(stmt))
        return found

    def bulk_put(
        self, collection_id: int, rows: Sequence[tuple[str, dict[str, Any]]]
    ) -> BulkPutCounts:
        """Insert or replace many memories with multi-row upserts.

        A key given twice keeps its last fields, as a sequence of :meth:`put` calls would.
        """
        latest = dict(rows)
        if not latest:
            return BulkPutCounts(created=0, replaced=0)
        self.session.flush()
        existing = self.keys_existing(collection_id, latest)
        now = utcnow()
        values = [
            {
                "collection_id": collection_id,
                "key": key,
                "fields": fields,
                "created_at": now,
                "updated_at": now,
            }
            for key, fields in latest.items()
        ]
        table = _table(Memory)
        dialect = self.session.get_bind().dialect.name
        for start in range(0, len(values), _UPSERT_CHUNK):
            chunk = values[start : start + _UPSERT_CHUNK]
            if dialect == "postgresql":
                pg_stmt = postgresql.insert(table).values(chunk)
                pg_stmt = pg_stmt.on_conflict_do_update(
                    index_elements=[table.c.collection_id, table.c.key],
                    set_={
                        "fields": pg_stmt.excluded.fields,
                        "updated_at": pg_stmt.excluded.updated_at,
                    },
                )
                self.session.execute(pg_stmt)
            elif dialect == "sqlite":
                lite_stmt = sqlite.insert(table).values(chunk)
                lite_stmt = lite_stmt.on_conflict_do_update(
                    index_elements=[table.c.collection_id, table.c.key],
                    set_={
                        "fields": lite_stmt.excluded.fields,
                        "updated_at": lite_stmt.excluded.updated_at,
                    },
                )
                self.session.execute(lite_stmt)
            else:
                raise StorageError(f"bulk_put does not support the {dialect!r} dialect")
        self._expire_loaded(collection_id, existing)
        return BulkPutCounts(created=len(latest) - len(existing), replaced=len(existing))

    def _expire_loaded(self, collection_id: int, keys: set[str]) -> None:
        # The upsert bypasses the identity map; reload replaced memories on next access.
        for obj in builtins.list(self.session.identity_map.values()):
            if isinstance(obj, Memory) and obj.collection_id == collection_id and obj.key in keys:
                self.session.expire(obj)


class CompileReportRepository:
    def __init__(self, session: Session) -> None:
        self.session = session

    def add(
        self,
        collection_id: int,
        *,
        revision: int,
        rule: str,
        n_memories: int,
        n_units: int,
        weights_checksum: str,
        report: dict[str, Any],
        duration_ms: float,
    ) -> CompileReport:
        compile_report = CompileReport(
            collection_id=collection_id,
            revision=revision,
            rule=rule,
            n_memories=n_memories,
            n_units=n_units,
            weights_checksum=weights_checksum,
            report=report,
            duration_ms=duration_ms,
        )
        self.session.add(compile_report)
        self.session.flush()
        return compile_report

    def latest(self, collection_id: int) -> CompileReport | None:
        """The most recently added report of the collection, or None."""
        stmt = (
            select(CompileReport)
            .where(CompileReport.collection_id == collection_id)
            .order_by(CompileReport.id.desc())
            .limit(1)
        )
        return self.session.scalars(stmt).first()
