"""Persistence: SQLAlchemy models, repositories, the unit of work and Alembic migrations.

Used by the use-case layer only; the engine never imports it.
"""

from service.storage.db import (
    WRITE_OPTION,
    SessionFactory,
    make_engine,
    make_session_factory,
    unit_of_work,
)
from service.storage.errors import DuplicateNameError, NotFoundError, StorageError
from service.storage.models import Base, Collection, CompileReport, Memory, Team
from service.storage.repositories import (
    DEFAULT_TEAM_NAME,
    BulkPutCounts,
    CollectionRepository,
    CompileReportRepository,
    MemoryPage,
    MemoryRepository,
    TeamRepository,
)

__all__ = [
    "DEFAULT_TEAM_NAME",
    "WRITE_OPTION",
    "Base",
    "BulkPutCounts",
    "Collection",
    "CollectionRepository",
    "CompileReport",
    "CompileReportRepository",
    "DuplicateNameError",
    "Memory",
    "MemoryPage",
    "MemoryRepository",
    "NotFoundError",
    "SessionFactory",
    "StorageError",
    "Team",
    "TeamRepository",
    "make_engine",
    "make_session_factory",
    "unit_of_work",
]
