"""Alembic environment for Cuebank.

Configured from code (service/storage/migrate.py): the database URL arrives as the
``sqlalchemy.url`` main option. Connections come from ``make_engine`` so SQLite gets the same
pragmas and transaction handling as the service.
"""

from __future__ import annotations

from alembic import context
from sqlalchemy import Connection, make_url

from service.storage.db import WRITE_OPTION, make_engine
from service.storage.models import Base

config = context.config
target_metadata = Base.metadata


def _url() -> str:
    url = config.get_main_option("sqlalchemy.url")
    if not url:
        raise RuntimeError("set the 'sqlalchemy.url' option; see service/storage/migrate.py")
    return url


def _run(connection: Connection) -> None:
    is_sqlite = connection.dialect.name == "sqlite"
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        compare_type=True,
        # SQLite cannot ALTER most things; batch mode rebuilds the table instead.
        render_as_batch=is_sqlite,
        # make_engine emits BEGIN itself, so DDL on SQLite is transactional too and a failed
        # migration leaves the database as it was.
        transactional_ddl=True,
    )
    with context.begin_transaction():
        context.run_migrations()
        if is_sqlite:
            # Foreign keys are off while migrating (see make_engine); check that the rebuilt
            # tables left no dangling reference before the migration commits.
            problems = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
            if problems:
                raise RuntimeError(f"migration left dangling foreign keys: {problems[:10]}")


def run_migrations_offline() -> None:
    url = _url()
    context.configure(
        url=url,
        target_metadata=target_metadata,
        literal_binds=True,
        dialect_opts={"paramstyle": "named"},
        render_as_batch=make_url(url).get_backend_name() == "sqlite",
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    given = config.attributes.get("connection")
    if isinstance(given, Connection):
        _run(given)
        return
    engine = make_engine(_url(), sqlite_foreign_keys=False)
    try:
        with engine.connect() as connection:
            _run(connection.execution_options(**{WRITE_OPTION: True}))
    finally:
        engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
