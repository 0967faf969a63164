"""Repository scenarios, run on SQLite and (when configured) PostgreSQL."""

from __future__ import annotations

import threading
from collections.abc import Callable
from datetime import UTC
from typing import Any

import pytest
from sqlalchemy import Engine, create_engine
from sqlalchemy.orm import Session

from service.storage.db import (
    SessionFactory,
    make_engine,
    make_session_factory,
    read_connection,
    unit_of_work,
)
from service.storage.errors import DuplicateNameError, NotFoundError
from service.storage.models import Collection, Team
from service.storage.repositories import (
    DEFAULT_TEAM_NAME,
    BulkPutCounts,
    CollectionRepository,
    CompileReportRepository,
    MemoryRepository,
    RevisionReader,
    TeamRepository,
    collection_revision,
)

SCHEMA: list[dict[str, Any]] = [
    {"name": "species", "kind": "text", "dims": 512},
    {"name": "depth_m", "kind": "number", "dims": 256, "min": 0.0, "max": 500.0},
]


def make_collection(session: Session, team: Team, name: str = "specimens") -> Collection:
    return CollectionRepository(session).create(
        team.id,
        name,
        schema=SCHEMA,
        rule="hebbian",
        rule_options={},
        verdict_options={"min_overlap": 0.5},
        seed=2**40 + 7,
        description="field station registry",
    )


@pytest.fixture
def team(session: Session) -> Team:
    return TeamRepository(session).get_or_create_default()


@pytest.fixture
def collection(session: Session, team: Team) -> Collection:
    return make_collection(session, team)


class TestTeamRepository:
    def test_default_team_is_created_once(self, session: Session) -> None:
        teams = TeamRepository(session)
        first = teams.get_or_create_default()
        second = teams.get_or_create_default()
        assert first.id == second.id
        assert first.name == DEFAULT_TEAM_NAME

    def test_created_team_is_found_by_name(self, session: Session) -> None:
        teams = TeamRepository(session)
        created = teams.create("workshop")
        found = teams.get_by_name("workshop")
        assert found is not None
        assert found.id == created.id
        assert found.created_at.tzinfo is not None

    def test_duplicate_team_name_is_refused_and_the_session_stays_usable(
        self, session: Session
    ) -> None:
        teams = TeamRepository(session)
        teams.create("workshop")
        with pytest.raises(DuplicateNameError, match="workshop"):
            teams.create("workshop")
        assert teams.get_by_name("workshop") is not None

    def test_unknown_team_name_gives_none(self, session: Session) -> None:
        assert TeamRepository(session).get_by_name("nobody") is None


class TestCollectionRepository:
    def test_created_collection_round_trips(
        self, session_factory: SessionFactory, team: Team, session: Session
    ) -> None:
        created = make_collection(session, team)
        session.commit()
        with unit_of_work(session_factory, write=False) as other:
            found = CollectionRepository(other).get(team.id, "specimens")
            assert found is not None
            assert found.id == created.id
            assert found.schema == SCHEMA
            assert found.rule == "hebbian"
            assert found.verdict_options == {"min_overlap": 0.5}
            assert found.seed == 2**40 + 7
            assert found.revision == 0
            assert found.description == "field station registry"
            assert found.created_at.tzinfo is UTC

    def test_missing_collection_gives_none(self, session: Session, team: Team) -> None:
        assert CollectionRepository(session).get(team.id, "nothing") is None

    def test_duplicate_name_in_one_team_is_refused(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        with pytest.raises(DuplicateNameError, match="specimens"):
            make_collection(session, team)
        assert CollectionRepository(session).list(team.id) == [collection]

    def test_same_name_in_another_team_is_allowed(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        other_team = TeamRepository(session).create("club")
        other = make_collection(session, other_team)
        assert other.id != collection.id

    def test_list_is_ordered_by_name_and_scoped_to_the_team(
        self, session: Session, team: Team
    ) -> None:
        for name in ["parts", "assets", "members"]:
            make_collection(session, team, name)
        make_collection(session, TeamRepository(session).create("club"), "aardvarks")
        names = [c.name for c in CollectionRepository(session).list(team.id)]
        assert names == ["assets", "members", "parts"]

    def test_update_of_description_keeps_the_revision(
        self, session: Session, collection: Collection
    ) -> None:
        repo = CollectionRepository(session)
        repo.update(collection, description="new words")
        assert collection.description == "new words"
        assert repo.revision(collection.id) == 0

    def test_update_of_the_rule_bumps_the_revision(
        self, session: Session, collection: Collection
    ) -> None:
        repo = CollectionRepository(session)
        repo.update(collection, rule="storkey", rule_options={"beta": 2.0})
        assert collection.rule == "storkey"
        assert collection.revision == 1

    def test_rename_onto_a_taken_name_is_refused(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        make_collection(session, team, "parts")
        repo = CollectionRepository(session)
        with pytest.raises(DuplicateNameError, match="parts"):
            repo.update(collection, name="parts")
        assert collection.name == "specimens"
        assert repo.get(team.id, "specimens") is not None

    def test_delete_cascades_to_memories_and_reports(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.put(collection.id, "a", {"species": "Bufo bufo"})
        add_report(session, collection)
        assert CollectionRepository(session).delete(collection.id)
        assert memories.count(collection.id) == 0
        assert CompileReportRepository(session).latest(collection.id) is None
        assert CollectionRepository(session).get(team.id, "specimens") is None

    def test_delete_of_a_missing_collection_gives_false(self, session: Session) -> None:
        assert not CollectionRepository(session).delete(987654)

    def test_deleting_a_team_cascades_to_its_collections(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        collection_id = collection.id
        session.delete(team)
        session.flush()
        session.expunge_all()
        assert CollectionRepository(session).get_by_id(collection_id) is None

    def test_bump_revision_increments_and_returns_the_new_value(
        self, session: Session, collection: Collection
    ) -> None:
        repo = CollectionRepository(session)
        assert [repo.bump_revision(collection.id) for _ in range(3)] == [1, 2, 3]
        assert repo.revision(collection.id) == 3
        # The loaded object is refreshed, not left showing the old value.
        assert collection.revision == 3

    def test_bump_revision_of_a_missing_collection_raises(self, session: Session) -> None:
        with pytest.raises(NotFoundError):
            CollectionRepository(session).bump_revision(987654)

    def test_revision_of_a_missing_collection_raises(self, session: Session) -> None:
        with pytest.raises(NotFoundError):
            CollectionRepository(session).revision(987654)


class TestCollectionRevision:
    def test_one_query_reads_id_revision_and_verdict_options_by_team_and_name(
        self, session_factory: SessionFactory
    ) -> None:
        with unit_of_work(session_factory, write=True) as session:
            default = TeamRepository(session).get_or_create_default()
            other = TeamRepository(session).create("harbour-lab")
            mine = make_collection(session, default)
            make_collection(session, other, name="elsewhere")
            CollectionRepository(session).bump_revision(mine.id)
            mine_id = mine.id
        with read_connection(session_factory) as connection:
            found = collection_revision(connection, DEFAULT_TEAM_NAME, "specimens")
            assert found == (mine_id, 1, {"min_overlap": 0.5})
            # another team's collection, or a missing one, is not found
            assert collection_revision(connection, DEFAULT_TEAM_NAME, "elsewhere") is None
            assert collection_revision(connection, "harbour-lab", "specimens") is None
            assert collection_revision(connection, "nobody", "specimens") is None


class TestRevisionReader:
    """The recall path's revision check on a connection each thread keeps (one statement)."""

    @staticmethod
    def _seed(session_factory: SessionFactory) -> int:
        with unit_of_work(session_factory, write=True) as session:
            default = TeamRepository(session).get_or_create_default()
            other = TeamRepository(session).create("harbour-lab")
            mine = make_collection(session, default)
            make_collection(session, other, name="elsewhere")
            return mine.id

    @staticmethod
    def _bump(session_factory: SessionFactory, collection_id: int) -> None:
        with unit_of_work(session_factory, write=True) as session:
            CollectionRepository(session).bump_revision(collection_id)

    def test_reads_what_the_pooled_query_reads(
        self, engine: Engine, session_factory: SessionFactory
    ) -> None:
        mine_id = self._seed(session_factory)
        reader = RevisionReader(engine)
        found = reader.read(DEFAULT_TEAM_NAME, "specimens")
        assert found == (mine_id, 0, {"min_overlap": 0.5})
        with read_connection(session_factory) as connection:
            assert found == collection_revision(connection, DEFAULT_TEAM_NAME, "specimens")
        assert reader.read(DEFAULT_TEAM_NAME, "elsewhere") is None
        assert reader.read("harbour-lab", "specimens") is None
        assert reader.read("nobody", "specimens") is None
        assert reader.opened == 1  # one connection, kept

    def test_a_commit_by_another_engine_is_seen_by_the_very_next_read(
        self, engine: Engine, session_factory: SessionFactory
    ) -> None:
        # another worker process writes through an engine of its own; the held connection is
        # in autocommit, so no snapshot of an older read hides the write
        mine_id = self._seed(session_factory)
        reader = RevisionReader(engine)
        assert reader.read(DEFAULT_TEAM_NAME, "specimens") == (mine_id, 0, {"min_overlap": 0.5})
        other = make_engine(engine.url.render_as_string(hide_password=False))
        try:
            for expected in (1, 2, 3):
                self._bump(make_session_factory(other), mine_id)
                found = reader.read(DEFAULT_TEAM_NAME, "specimens")
                assert found is not None
                assert found.revision == expected
        finally:
            other.dispose()
        assert reader.opened == 1

    def test_each_thread_keeps_its_own_connection(
        self, engine: Engine, session_factory: SessionFactory
    ) -> None:
        mine_id = self._seed(session_factory)
        reader = RevisionReader(engine)
        seen: list[Any] = []

        def read() -> None:
            seen.append(reader.read(DEFAULT_TEAM_NAME, "specimens"))

        threads = [threading.Thread(target=read) for _ in range(3)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert [s.id for s in seen] == [mine_id] * 3
        assert reader.opened == 3
        read()  # this thread opens one more; the ended threads' connections are closed
        assert reader.opened == 4
        assert len(reader._held) == 1

    def test_a_broken_connection_is_replaced_and_the_read_still_answers(
        self, engine: Engine, session_factory: SessionFactory
    ) -> None:
        mine_id = self._seed(session_factory)
        reader = RevisionReader(engine)
        assert reader.read(DEFAULT_TEAM_NAME, "specimens") is not None
        reader._held[threading.current_thread()].close()  # as a restarted server would
        found = reader.read(DEFAULT_TEAM_NAME, "specimens")
        assert found is not None
        assert found.id == mine_id
        found = reader.read(DEFAULT_TEAM_NAME, "specimens")
        assert found is not None
        assert found.id == mine_id
        assert reader.opened == 2  # and a new connection kept after it

    def test_disposing_the_engine_closes_the_kept_connections(
        self, engine: Engine, session_factory: SessionFactory
    ) -> None:
        mine_id = self._seed(session_factory)
        reader = RevisionReader(engine)
        reader.read(DEFAULT_TEAM_NAME, "specimens")
        kept = reader._held[threading.current_thread()]
        engine.dispose()
        assert reader._held == {}
        with pytest.raises(Exception, match="closed"):
            kept.cursor().execute("SELECT 1")
        found = reader.read(DEFAULT_TEAM_NAME, "specimens")  # and reading goes on
        assert found is not None
        assert found.id == mine_id


def test_an_in_memory_sqlite_database_is_read_through_its_one_pooled_connection() -> None:
    from service.storage.models import Base

    engine = create_engine("sqlite://")
    try:
        Base.metadata.create_all(engine)
        factory = make_session_factory(engine)
        mine_id = TestRevisionReader._seed(factory)
        reader = RevisionReader(engine)
        found = reader.read(DEFAULT_TEAM_NAME, "specimens")
        assert found is not None
        assert found.id == mine_id
        assert reader.opened == 0
    finally:
        engine.dispose()


class TestMemoryRepository:
    def test_put_creates_then_replaces(self, session: Session, collection: Collection) -> None:
        memories = MemoryRepository(session)
        assert memories.put(collection.id, "m1", {"species": "Bufo bufo"}) is True
        first = memories.get(collection.id, "m1")
        assert first is not None
        created_at, updated_at = first.created_at, first.updated_at

        assert memories.put(collection.id, "m1", {"species": "Rana temporaria"}) is False
        again = memories.get(collection.id, "m1")
        assert again is not None
        assert again.fields == {"species": "Rana temporaria"}
        assert again.created_at == created_at
        assert again.updated_at >= updated_at
        assert memories.count(collection.id) == 1

    def test_put_with_the_same_fields_still_touches_updated_at(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.put(collection.id, "m1", {"species": "Bufo bufo"})
        memory = memories.get(collection.id, "m1")
        assert memory is not None
        before = memory.updated_at
        memories.put(collection.id, "m1", {"species": "Bufo bufo"})
        session.expire(memory)
        assert memory.updated_at >= before

    def test_get_of_a_missing_key_gives_none(
        self, session: Session, collection: Collection
    ) -> None:
        assert MemoryRepository(session).get(collection.id, "absent") is None

    def test_delete_reports_whether_the_memory_existed(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.put(collection.id, "m1", {})
        assert memories.delete(collection.id, "m1") is True
        assert memories.delete(collection.id, "m1") is False
        assert memories.count(collection.id) == 0

    def test_same_key_in_two_collections_is_two_memories(
        self, session: Session, team: Team, collection: Collection
    ) -> None:
        other = make_collection(session, team, "parts")
        memories = MemoryRepository(session)
        assert memories.put(collection.id, "k", {"n": 1})
        assert memories.put(other.id, "k", {"n": 2})
        assert memories.all_ordered(collection.id) == [("k", {"n": 1})]
        assert memories.all_ordered(other.id) == [("k", {"n": 2})]

    def test_pages_walk_every_key_once_in_order(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        keys = [f"k{i:03d}" for i in range(25)]
        for key in reversed(keys):
            memories.put(collection.id, key, {"key": key})
        seen: list[str] = []
        cursor: str | None = None
        pages = 0
        while True:
            page = memories.page(collection.id, cursor, 10)
            seen.extend(m.key for m in page.items)
            pages += 1
            if page.next_after is None:
                break
            cursor = page.next_after
        assert seen == keys
        assert pages == 3

    def test_last_full_page_has_no_cursor(self, session: Session, collection: Collection) -> None:
        memories = MemoryRepository(session)
        for key in ["a", "b"]:
            memories.put(collection.id, key, {})
        page = memories.page(collection.id, None, 2)
        assert [m.key for m in page.items] == ["a", "b"]
        assert page.next_after is None

    def test_page_limit_below_one_is_refused(
        self, session: Session, collection: Collection
    ) -> None:
        with pytest.raises(ValueError, match="limit"):
            MemoryRepository(session).page(collection.id, None, 0)

    def test_all_ordered_gives_keys_and_fields_sorted_by_key(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.put(collection.id, "b", {"x": [1, 2]})
        memories.put(collection.id, "a", {"x": None})
        assert memories.all_ordered(collection.id) == [("a", {"x": None}), ("b", {"x": [1, 2]})]

    def test_keys_existing_finds_stored_keys_among_many(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.bulk_put(collection.id, [(f"k{i}", {}) for i in range(0, 1200, 2)])
        asked = [f"k{i}" for i in range(1200)]
        assert memories.keys_existing(collection.id, asked) == {f"k{i}" for i in range(0, 1200, 2)}
        assert memories.keys_existing(collection.id, []) == set()

    def test_bulk_put_creates_and_replaces_in_one_call(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        memories.put(collection.id, "k0001", {"v": "old"})
        loaded = memories.get(collection.id, "k0001")
        assert loaded is not None
        rows = [(f"k{i:04d}", {"v": i}) for i in range(1, 1001)]
        assert memories.bulk_put(collection.id, rows) == BulkPutCounts(created=999, replaced=1)
        assert memories.count(collection.id) == 1000
        # The memory loaded before the upsert shows the new fields, not stale ones.
        assert loaded.fields == {"v": 1}
        stored = memories.all_ordered(collection.id)
        assert stored == rows

    def test_bulk_put_keeps_the_last_fields_of_a_repeated_key(
        self, session: Session, collection: Collection
    ) -> None:
        memories = MemoryRepository(session)
        counts = memories.bulk_put(collection.id, [("a", {"n": 1}), ("a", {"n": 2})])
        assert counts == BulkPutCounts(created=1, replaced=0)
        assert memories.all_ordered(collection.id) == [("a", {"n": 2})]

    def test_bulk_put_of_nothing_does_nothing(
        self, session: Session, collection: Collection
    ) -> None:
        assert MemoryRepository(session).bulk_put(collection.id, []) == BulkPutCounts(0, 0)


def add_report(session: Session, collection: Collection, revision: int = 0) -> int:
    report = CompileReportRepository(session).add(
        collection.id,
        revision=revision,
        rule="hebbian",
        n_memories=3,
        n_units=768,
        weights_checksum="0" * 64,
        report={"load": 0.004},
        duration_ms=1.5,
    )
    return report.id


class TestCompileReportRepository:
    def test_latest_is_the_last_added(self, session: Session, collection: Collection) -> None:
        add_report(session, collection, revision=0)
        last_id = add_report(session, collection, revision=1)
        latest = CompileReportRepository(session).latest(collection.id)
        assert latest is not None
        assert latest.id == last_id
        assert latest.revision == 1
        assert latest.report == {"load": 0.004}
        assert latest.duration_ms == pytest.approx(1.5)

    def test_latest_without_reports_is_none(self, session: Session, collection: Collection) -> None:
        assert CompileReportRepository(session).latest(collection.id) is None


class TestUnitOfWork:
    def test_success_commits(self, session_factory: SessionFactory) -> None:
        with unit_of_work(session_factory, write=True) as session:
            TeamRepository(session).create("workshop")
        with unit_of_work(session_factory, write=False) as session:
            assert TeamRepository(session).get_by_name("workshop") is not None

    def test_exception_rolls_back(self, session_factory: SessionFactory) -> None:
        def create_then_fail() -> None:
            with unit_of_work(session_factory, write=True) as session:
                TeamRepository(session).create("workshop")
                raise RuntimeError("boom")

        with pytest.raises(RuntimeError, match="boom"):
            create_then_fail()
        with unit_of_work(session_factory, write=False) as session:
            assert TeamRepository(session).get_by_name("workshop") is None


def run_in_threads(n_threads: int, work: Callable[[], None]) -> list[BaseException]:
    """Run ``work`` in ``n_threads`` threads started together; the exceptions they raised."""
    errors: list[BaseException] = []
    start = threading.Barrier(n_threads)

    def target() -> None:
        try:
            start.wait()
            work()
        except BaseException as exc:  # collected so the main thread can fail the test
            errors.append(exc)

    threads = [threading.Thread(target=target) for _ in range(n_threads)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    return errors


class TestConcurrentWriters:
    @pytest.fixture
    def collection_id(self, session_factory: SessionFactory) -> int:
        with unit_of_work(session_factory, write=True) as session:
            team = TeamRepository(session).get_or_create_default()
            return make_collection(session, team).id

    def test_bumps_from_two_threads_are_all_counted(
        self, session_factory: SessionFactory, collection_id: int
    ) -> None:
        # Several workers may write to one collection at once (PostgreSQL deployments); the
        # increment in SQL must not lose any of them whatever the isolation level.
        def bump() -> None:
            for _ in range(100):
                with unit_of_work(session_factory, write=True) as session:
                    CollectionRepository(session).bump_revision(collection_id)

        assert run_in_threads(2, bump) == []
        with unit_of_work(session_factory, write=False) as session:
            assert CollectionRepository(session).revision(collection_id) == 200

    def test_read_then_write_under_a_row_lock_keeps_every_update(
        self, session_factory: SessionFactory, collection_id: int
    ) -> None:
        # PostgreSQL runs READ COMMITTED: without for_update both threads would read the same
        # description and one append would be lost.
        def append() -> None:
            for _ in range(50):
                with unit_of_work(session_factory, write=True) as session:
                    team = TeamRepository(session).get_or_create_default()
                    repo = CollectionRepository(session)
                    collection = repo.get(team.id, "specimens", for_update=True)
                    assert collection is not None
                    repo.update(collection, description=collection.description + "x")

        assert run_in_threads(2, append) == []
        with unit_of_work(session_factory, write=False) as session:
            team = TeamRepository(session).get_or_create_default()
            collection = CollectionRepository(session).get(team.id, "specimens")
            assert collection is not None
            assert collection.description == "field station registry" + "x" * 100
