"""Argument checks shared by the engine's public functions.

Every public entry point validates its arrays here so that bad input surfaces as an
:class:`~service.engine.errors.EngineError` naming the argument and the bound, never as a numpy
traceback from deep inside a product.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .errors import ParameterError, ShapeError, StateValueError

#: Units per pattern above which float32 products of ±1 vectors stop being exact integers.
MAX_UNITS = 1 << 20


def as_array(value: Any, name: str) -> NDArray[Any]:
    """Turn ``value`` into a numeric array or raise a :class:`StateValueError`."""
    try:
        arr = np.asarray(value)
    except (TypeError, ValueError) as exc:  # ragged lists and the like
        raise StateValueError(f"{name} is not a rectangular numeric array: {exc}") from None
    if (
        arr.dtype == object
        or np.issubdtype(arr.dtype, np.complexfloating)
        or not (np.issubdtype(arr.dtype, np.number) or np.issubdtype(arr.dtype, np.bool_))
    ):
        raise StateValueError(f"{name} must be numeric, got dtype {arr.dtype}")
    return arr


def check_matrix(arr: NDArray[Any], name: str, *, n_units: int | None = None) -> None:
    """Require a 2-D array with at least one row and, if given, ``n_units`` columns."""
    if arr.ndim != 2:
        raise ShapeError(f"{name} must be 2-D (n_rows, n_units), got {arr.ndim}-D {arr.shape}")
    if arr.shape[0] == 0:
        raise ShapeError(f"{name} has no rows; at least 1 is needed")
    if arr.shape[1] == 0:
        raise ShapeError(f"{name} has no units; at least 1 is needed")
    if arr.shape[1] > MAX_UNITS:
        raise ShapeError(f"{name} has {arr.shape[1]} units, above the engine's limit {MAX_UNITS}")
    if n_units is not None and arr.shape[1] != n_units:
        raise ShapeError(f"{name} has {arr.shape[1]} units per row, the memory has {n_units}")


def _check_finite(arr: NDArray[Any], name: str) -> None:
    if np.issubdtype(arr.dtype, np.floating) and not np.isfinite(arr).all():
        raise StateValueError(f"{name} contains NaN or infinite values")


def as_patterns(
    value: Any, name: str = "patterns", *, n_units: int | None = None
) -> NDArray[np.int8]:
    """Validate an (n_rows, n_units) matrix of ±1 values and return it as int8."""
    arr = as_array(value, name)
    if arr.ndim == 1:
        arr = arr[np.newaxis, :]
    check_matrix(arr, name, n_units=n_units)
    _check_finite(arr, name)
    allowed = _in_set(arr, with_zero=False)
    if not allowed.all():
        bad = arr[~allowed].flat[0]
        raise StateValueError(f"{name} must hold only -1 and +1, found {bad!r}")
    return np.ascontiguousarray(arr, dtype=np.int8)


def _in_set(arr: NDArray[Any], *, with_zero: bool) -> NDArray[np.bool_]:
    """Where ``arr`` holds -1 or +1 (or 0, ``with_zero``): two comparisons, not ``np.isin``,
    which costs several times more on the recall path's (cues, units) matrices.

    >>> _in_set(np.array([-2, -1, 0, 1, 2], dtype=np.int8), with_zero=True).tolist()
    [False, True, True, True, False]
    >>> _in_set(np.array([-1.0, 0.5, 0.0, 1.0]), with_zero=False).tolist()
    [True, False, False, True]
    """
    if arr.dtype.kind in "iu":
        inside = (arr >= -1) & (arr <= 1)
        return inside if with_zero else inside & (arr != 0)
    magnitude = np.abs(arr)
    unit: NDArray[np.bool_] = magnitude == 1
    return unit | (arr == 0) if with_zero else unit


def as_cues(value: Any, name: str = "cues", *, n_units: int | None = None) -> NDArray[np.int8]:
    """Validate an (n_cues, n_units) matrix of values in {-1, 0, +1}; 0 marks an unknown unit."""
    if isinstance(value, np.ndarray) and value.dtype == np.int8 and value.ndim == 2:
        # the engine's own encoding: only the shape and the values need a look
        check_matrix(value, name, n_units=n_units)
        if value.min() < -1 or value.max() > 1:  # two passes, no temporaries
            bad = value[(value < -1) | (value > 1)].flat[0]
            raise StateValueError(f"{name} must hold only -1, 0 and +1, found {bad!r}")
        return value if value.flags.c_contiguous else np.ascontiguousarray(value)
    arr = as_array(value, name)
    if arr.ndim == 1:
        arr = arr[np.newaxis, :]
    check_matrix(arr, name, n_units=n_units)
    _check_finite(arr, name)
    allowed = _in_set(arr, with_zero=True)
    if not allowed.all():
        bad = arr[~allowed].flat[0]
        raise StateValueError(f"{name} must hold only -1, 0 and +1, found {bad!r}")
    return np.ascontiguousarray(arr, dtype=np.int8)


def check_int(value: Any, name: str, *, low: int, high: int) -> int:
    """Require an integer in [low, high]."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise ParameterError(f"{name} must be an integer, got {value!r}")
    if not low <= int(value) <= high:
        raise ParameterError(f"{name} is {value}, outside the allowed range [{low}, {high}]")
    return int(value)


def check_float(
    value: Any,
    name: str,
    *,
    low: float = -math.inf,
    high: float = math.inf,
    low_open: bool = False,
) -> float:
    """Require a finite real number in [low, high] (or (low, high] when ``low_open``)."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise ParameterError(f"{name} must be a number, got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise ParameterError(f"{name} must be finite, got {x!r}")
    if x < low or (low_open and x <= low):
        op = ">" if low_open else "≥"
        raise ParameterError(f"{name} is {x}, it must be {op} {low}")
    if x > high:
        raise ParameterError(f"{name} is {x}, above the maximum {high}")
    return x


def check_choice(value: Any, name: str, choices: tuple[str, ...]) -> str:
    """Require one of ``choices``."""
    if value not in choices:
        raise ParameterError(f"{name} must be one of {', '.join(choices)}; got {value!r}")
    return str(value)
