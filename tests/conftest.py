"""Fixtures shared by every test package."""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine
from sqlalchemy.engine import make_url

POSTGRES_ENV = "CUEBANK_TEST_DATABASE_URL"


def _postgres_schema_url(base_url: str) -> Iterator[str]:
    # A fresh schema per test, made the connection's search_path through libpq "options", so
    # the URL alone isolates the test (Alembic included) and dropping the schema cleans up.
    schema = f"cuebank_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base_url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as connection:
            connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
        url = make_url(base_url).update_query_dict({"options": f"-csearch_path={schema}"})
        try:
            yield url.render_as_string(hide_password=False)
        finally:
            with admin.connect() as connection:
                connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
    finally:
        admin.dispose()


@pytest.fixture(scope="session")
def postgres_session_url() -> Iterator[str]:
    """One PostgreSQL schema for the whole test session, dropped at its end; skips without one.

    For suites that empty the tables between tests instead of paying for a schema and a
    migration run per test.
    """
    base_url = os.environ.get(POSTGRES_ENV)
    if not base_url:
        pytest.skip(f"{POSTGRES_ENV} is not set; PostgreSQL variant not run")
    yield from _postgres_schema_url(base_url)


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """A fresh PostgreSQL schema for one test, dropped after it; skips without a server."""
    base_url = os.environ.get(POSTGRES_ENV)
    if not base_url:
        pytest.skip(f"{POSTGRES_ENV} is not set; PostgreSQL variant not run")
    yield from _postgres_schema_url(base_url)


@pytest.fixture(
    params=[
        pytest.param("sqlite", id="sqlite"),
        pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
    ]
)
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """URL of an empty database: a SQLite file, and PostgreSQL when the env var names one."""
    if request.param == "sqlite":
        yield f"sqlite:///{(tmp_path / 'cuebank.sqlite3').as_posix()}"
        return
    base_url = os.environ.get(POSTGRES_ENV)
    if not base_url:
        pytest.skip(f"{POSTGRES_ENV} is not set; PostgreSQL variant not run")
    yield from _postgres_schema_url(base_url)
