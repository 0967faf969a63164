"""SQLite-specific behaviour: connection pragmas and writers that do not lose updates."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
from sqlalchemy import Engine

from service.storage.db import (
    SQLITE_BUSY_TIMEOUT_MS,
    make_engine,
    make_session_factory,
    unit_of_work,
)
from service.storage.migrate import upgrade_to_head
from service.storage.models import Collection
from service.storage.repositories import CollectionRepository, TeamRepository


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    # A directory that does not exist yet: make_engine must create it.
    return f"sqlite:///{(tmp_path / 'data' / 'cuebank.sqlite3').as_posix()}"


def pragma(engine: Engine, name: str) -> object:
    with engine.connect() as connection:
        return connection.exec_driver_sql(f"PRAGMA {name}").scalar()


class TestPragmas:
    def test_every_connection_gets_the_service_pragmas(self, sqlite_url: str) -> None:
        engine = make_engine(sqlite_url)
        try:
            assert pragma(engine, "journal_mode") == "wal"
            assert pragma(engine, "foreign_keys") == 1
            assert pragma(engine, "busy_timeout") == SQLITE_BUSY_TIMEOUT_MS
            # Source: SQLite documentation of PRAGMA synchronous (FULL = 2, NORMAL = 1).
            assert pragma(engine, "synchronous") == 2
        finally:
            engine.dispose()

    def test_synchronous_normal_is_applied_when_asked(self, sqlite_url: str) -> None:
        engine = make_engine(sqlite_url, sqlite_synchronous="NORMAL")
        try:
            assert pragma(engine, "synchronous") == 1
        finally:
            engine.dispose()

    def test_missing_data_directory_is_created(self, tmp_path: Path, sqlite_url: str) -> None:
        engine = make_engine(sqlite_url)
        engine.dispose()
        assert (tmp_path / "data").is_dir()


class TestConcurrentWriters:
    def test_read_then_write_increments_from_two_threads_are_all_kept(
        self, sqlite_url: str
    ) -> None:
        # Each unit reads the revision in Python and writes back read + 1: the worst pattern
        # for lost updates. With the sqlite3 driver's default transaction handling (BEGIN only
        # at the first write) both threads read the same value: trial runs ended near 300, half
        # the increments silently lost. BEGIN IMMEDIATE for write units makes them take turns.
        upgrade_to_head(sqlite_url)
        engine = make_engine(sqlite_url)
        factory = make_session_factory(engine)
        with unit_of_work(factory, write=True) as session:
            team = TeamRepository(session).get_or_create_default()
            collection_id = (
                CollectionRepository(session)
                .create(
                    team.id,
                    "counter",
                    schema={},
                    rule="hebbian",
                    rule_options={},
                    verdict_options={},
                    seed=1,
                )
                .id
            )
        n_threads, n_increments = 2, 300
        errors: list[BaseException] = []
        start = threading.Barrier(n_threads)

        def increment() -> None:
            try:
                start.wait()
                for _ in range(n_increments):
                    with unit_of_work(factory, write=True) as session:
                        collection = session.get(Collection, collection_id)
                        assert collection is not None
                        collection.revision = collection.revision + 1
            except BaseException as exc:  # collected so the main thread can fail the test
                errors.append(exc)

        threads = [threading.Thread(target=increment) for _ in range(n_threads)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        try:
            assert errors == []
            with unit_of_work(factory, write=False) as session:
                assert CollectionRepository(session).revision(collection_id) == 600
        finally:
            engine.dispose()
