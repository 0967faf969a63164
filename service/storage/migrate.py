"""Alembic driven from code: there is no alembic.ini, the configuration is built here.

The scripts live in the repository's ``migrations/`` directory, next to the ``service``
package (the project is installed in editable mode).
"""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

import service
from service.storage.db import make_engine

__all__ = [
    "MIGRATIONS_DIR",
    "alembic_config",
    "current_revision",
    "downgrade",
    "head_revision",
    "is_at_head",
    "upgrade_to_head",
]

MIGRATIONS_DIR = Path(service.__file__).resolve().parents[1] / "migrations"


def alembic_config(url: str) -> Config:
    """An Alembic configuration for the database at ``url``."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    # Main options go through ConfigParser interpolation, where a lone "%" (common in
    # URL-encoded passwords and options) is a syntax error.
    config.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return config


def upgrade_to_head(url: str) -> None:
    """Apply every pending migration."""
    command.upgrade(alembic_config(url), "head")


def downgrade(url: str, target: str) -> None:
    """Revert migrations down to ``target`` (a revision id, ``base`` or ``-1``)."""
    command.downgrade(alembic_config(url), target)


def head_revision() -> str:
    """The newest revision among the migration scripts."""
    head = ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    if head is None:  # pragma: no cover - the repository always ships migrations
        raise RuntimeError(f"no migrations found in {MIGRATIONS_DIR}")
    return head


def current_revision(url: str) -> str | None:
    """The revision the database is at, or None for a database never migrated."""
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return MigrationContext.configure(connection).get_current_revision()
    finally:
        engine.dispose()


def is_at_head(url: str) -> bool:
    """Whether the database has every migration applied."""
    return current_revision(url) == head_revision()
