"""Fixtures for the storage tests: a migrated database per test, on every backend."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from sqlalchemy import Engine
from sqlalchemy.orm import Session

from service.storage.db import SessionFactory, make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head


@pytest.fixture
def engine(database_url: str) -> Iterator[Engine]:
    # Through the migrations rather than create_all, so every storage test also exercises
    # the schema a real deployment gets.
    upgrade_to_head(database_url)
    engine = make_engine(database_url)
    yield engine
    engine.dispose()


@pytest.fixture
def session_factory(engine: Engine) -> SessionFactory:
    return make_session_factory(engine)


@pytest.fixture
def session(session_factory: SessionFactory) -> Iterator[Session]:
    with session_factory() as session:
        yield session
