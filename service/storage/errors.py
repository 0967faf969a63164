"""Errors raised by the storage layer.

The use-case layer maps these to service errors; nothing here knows about HTTP.

    StorageError
     ├── DuplicateNameError   a unique name (team, collection) is already taken
     └── NotFoundError        a row addressed by id does not exist
"""

from __future__ import annotations

__all__ = ["DuplicateNameError", "NotFoundError", "StorageError"]


class StorageError(Exception):
    """Base class of every error the storage layer raises on purpose."""


class DuplicateNameError(StorageError):
    """A name that must be unique in its scope is already in use."""

    def __init__(self, kind: str, name: str) -> None:
        super().__init__(f"a {kind} named {name!r} already exists")
        self.kind = kind
        self.name = name


class NotFoundError(StorageError):
    """A row addressed by its id does not exist (it may have been deleted concurrently)."""

    def __init__(self, kind: str, ident: int | str) -> None:
        super().__init__(f"{kind} {ident!r} does not exist")
        self.kind = kind
        self.ident = ident
