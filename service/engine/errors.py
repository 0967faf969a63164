"""Errors raised by the engine.

Every engine error is also a :class:`ValueError`, so the engine can be used on its own with
plain ``except ValueError``. The use-case layer maps each class to a service error with an
HTTP status and a stable problem type.

::

    ValueError
    └── EngineError
        ├── ShapeError            an array has the wrong number of dimensions or size
        ├── StateValueError       a pattern, cue or state holds a disallowed value, or NaN
        ├── ParameterError        a hyperparameter or option is outside its allowed range
        ├── EmptyMemoryError      an operation needs at least one stored memory
        ├── DependentMemoryError  the projection rule met duplicate or linearly dependent memories
        ├── SchemaError           a collection schema is malformed (names the field)
        └── RecordError           a record or cue does not fit its schema (names the field)
"""

from __future__ import annotations

__all__ = [
    "DependentMemoryError",
    "EmptyMemoryError",
    "EngineError",
    "ParameterError",
    "RecordError",
    "SchemaError",
    "ShapeError",
    "StateValueError",
]


class EngineError(ValueError):
    """Base class of every error the engine raises on bad input."""


class ShapeError(EngineError):
    """An array argument has the wrong number of dimensions or the wrong size."""


class StateValueError(EngineError):
    """An array holds a value outside its allowed set (e.g. not in {-1, +1}) or a NaN."""


class ParameterError(EngineError):
    """A hyperparameter or option is outside its allowed range."""


class EmptyMemoryError(EngineError):
    """The operation needs at least one stored memory."""


class DependentMemoryError(EngineError):
    """Duplicate or linearly dependent memories where the rule needs independent ones.

    Attributes
    ----------
    indices : tuple of int
        Positions (in the pattern matrix) of the memories involved; the last one is the memory
        that could not be added.
    """

    def __init__(self, message: str, indices: tuple[int, ...]) -> None:
        super().__init__(message)
        self.indices = indices


class SchemaError(EngineError):
    """A schema is malformed. ``field`` names the offending field when there is one."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


class RecordError(EngineError):
    """A record or cue does not fit its schema. ``field`` names the offending field."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field
