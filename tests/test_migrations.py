"""Migrations apply, revert and re-apply, and describe exactly the models' schema."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Column, Engine, Integer, MetaData, inspect

from service.storage.db import make_engine
from service.storage.migrate import (
    current_revision,
    downgrade,
    head_revision,
    is_at_head,
    upgrade_to_head,
)
from service.storage.models import NAMING_CONVENTION, Base

TABLES = {
    "teams",
    "collections",
    "memories",
    "compile_reports",
    "reconciliation_jobs",
    "reconciliation_rows",
    "api_keys",
    "audit_events",
}


@pytest.fixture
def engine(database_url: str) -> Iterator[Engine]:
    engine = make_engine(database_url)
    yield engine
    engine.dispose()


def table_names(engine: Engine) -> set[str]:
    return set(inspect(engine).get_table_names()) - {"alembic_version"}


def drift(engine: Engine, metadata: MetaData) -> list[object]:
    with engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        return list(compare_metadata(context, metadata))


class TestMigrations:
    def test_upgrade_downgrade_upgrade_on_an_empty_database(
        self, database_url: str, engine: Engine
    ) -> None:
        assert current_revision(database_url) is None
        upgrade_to_head(database_url)
        assert table_names(engine) == TABLES
        downgrade(database_url, "base")
        assert table_names(engine) == set()
        assert current_revision(database_url) is None
        upgrade_to_head(database_url)
        assert table_names(engine) == TABLES
        assert current_revision(database_url) == head_revision()

    def test_is_at_head_only_after_upgrading(self, database_url: str) -> None:
        assert not is_at_head(database_url)
        upgrade_to_head(database_url)
        assert is_at_head(database_url)

    def test_migrated_schema_matches_the_models(self, database_url: str, engine: Engine) -> None:
        upgrade_to_head(database_url)
        assert drift(engine, Base.metadata) == []

    def test_drift_check_notices_a_column_missing_from_the_migrations(
        self, database_url: str, engine: Engine
    ) -> None:
        # Guards the guard: a models change without a migration must show up as drift.
        upgrade_to_head(database_url)
        changed = MetaData(naming_convention=NAMING_CONVENTION)
        for table in Base.metadata.sorted_tables:
            table.to_metadata(changed)
        changed.tables["memories"].append_column(Column("weight", Integer, nullable=True))
        differences = drift(engine, changed)
        assert [d[0] for d in differences if isinstance(d, tuple)] == ["add_column"]
