"""Bulk-import bodies (NDJSON, CSV) parsed into the rows the import use-case takes.

A row that cannot be read becomes a :class:`RowError` in the stream rather than an exception,
so one import reports every bad row at once. Problems with the file as a whole (no ``key``
column, a missing or unknown column) reject the import before any row is looked at.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Iterator, Mapping
from typing import Any

from service.recall.errors import ImportRejected, LimitExceeded
from service.recall.models import RowError

from .bodies import strict_json_loads

__all__ = ["ImportRow", "parse_csv", "parse_ndjson"]

ImportRow = tuple[int, str | None, Any] | RowError


def parse_ndjson(text: str) -> Iterator[ImportRow]:
    """Rows of one JSON object per line, ``{"key": ..., "fields": {...}}``; row = line number.

    >>> list(parse_ndjson('{"key": "SMP-0001", "fields": {"site_code": "SMP-N3"}}\\n\\n[1]'))
    ... # doctest: +NORMALIZE_WHITESPACE
    [(1, 'SMP-0001', {'site_code': 'SMP-N3'}),
     RowError(row=3, key=None, field=None, reason='a line must be a JSON object, got an array')]
    """
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue  # blank lines (a trailing newline, say) carry nothing
        try:
            obj = strict_json_loads(line)
        except json.JSONDecodeError as exc:
            yield RowError(number, None, None, f"not valid JSON: {exc.msg} at column {exc.colno}")
            continue
        except RecursionError:
            yield RowError(number, None, None, "not valid JSON: nested too deep")
            continue
        except ValueError as exc:
            yield RowError(number, None, None, f"not valid JSON: {exc}")
            continue
        if not isinstance(obj, dict):
            yield RowError(number, None, None, f"a line must be a JSON object, got {_kind(obj)}")
            continue
        key = obj.get("key")
        unknown = sorted(set(obj) - {"key", "fields"})
        if unknown:
            yield RowError(
                number,
                key if isinstance(key, str) else None,
                unknown[0],
                f"unknown member {unknown[0]!r}; a line has only 'key' and 'fields'",
            )
            continue
        if not isinstance(key, str):
            yield RowError(number, None, "key", f"'key' must be a string, got {_kind(key)}")
            continue
        fields = obj.get("fields")
        if not isinstance(fields, dict):
            yield RowError(
                number, key, "fields", f"'fields' must be an object, got {_kind(fields)}"
            )
            continue
        yield (number, key, fields)


def parse_csv(
    text: str, kinds: Mapping[str, str], *, max_columns: int | None = None
) -> Iterator[ImportRow]:
    """Rows of a CSV with a header: a ``key`` column and one column per field of ``kinds``.

    An empty cell is a missing value; number cells must parse as finite numbers. A header
    with more than ``max_columns`` columns is refused as a whole (limit ``max_fields``).

    >>> rows = parse_csv("key,depth_m\\nSMP-0001,3.5\\nSMP-0002,deep\\n", {"depth_m": "number"})
    >>> list(rows)  # doctest: +NORMALIZE_WHITESPACE
    [(1, 'SMP-0001', {'depth_m': 3.5}),
     RowError(row=2, key='SMP-0002', field='depth_m', reason="'deep' is not a number")]
    """
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        raise _header_error(None, "the CSV is empty; it needs a header row") from None
    except csv.Error as exc:
        raise _header_error(None, f"the CSV header cannot be read: {exc}") from None
    if max_columns is not None and len(header) > max_columns:
        raise LimitExceeded(
            f"the CSV header has {len(header)} columns, above the limit of {max_columns} "
            "(a key and max_fields fields); nothing was written",
            limit="max_fields",
            value=len(header),
            maximum=max_columns,
        )
    header = [name.strip() for name in header]
    _check_header(header, kinds)
    try:
        for number, cells in enumerate(reader, start=1):
            if not any(cell.strip() for cell in cells):
                continue
            yield _csv_row(number, header, cells, kinds)
    except csv.Error as exc:
        yield RowError(reader.line_num, None, None, f"the CSV cannot be read here: {exc}")


def _check_header(header: list[str], kinds: Mapping[str, str]) -> None:
    expected = ["key", *kinds]
    seen: set[str] = set()
    for name in header:
        if name in seen:
            raise _header_error(name, f"the CSV header names column {name!r} twice")
        seen.add(name)
    for name in expected:
        if name not in seen:
            raise _header_error(
                name,
                f"the CSV header has no column {name!r} (expected columns: {', '.join(expected)})",
            )
    for name in header:
        if name not in expected:
            raise _header_error(
                name,
                f"the CSV header has a column {name!r} that is no field of the collection "
                f"(expected columns: {', '.join(expected)})",
            )


def _csv_row(
    number: int, header: list[str], cells: list[str], kinds: Mapping[str, str]
) -> ImportRow:
    key = cells[header.index("key")].strip() if len(cells) > header.index("key") else None
    key = key or None
    if len(cells) != len(header):
        return RowError(
            number, key, None, f"the row has {len(cells)} cells, the header has {len(header)}"
        )
    fields: dict[str, Any] = {}
    for name, cell in zip(header, cells, strict=True):
        if name == "key":
            continue
        value = cell.strip()
        if not value:
            fields[name] = None
        elif kinds[name] == "number":
            try:
                number_value = float(value)
            except ValueError:
                return RowError(number, key, name, f"{value!r} is not a number")
            if not math.isfinite(number_value):
                return RowError(number, key, name, f"{value!r} is not a finite number")
            fields[name] = number_value
        else:
            # Text and categories keep the caller's spacing inside the value; dates are ISO
            # strings the use-case checks.
            fields[name] = cell if kinds[name] in ("text", "category") else value
    return (number, key, fields)


def _header_error(column: str | None, detail: str) -> ImportRejected:
    return ImportRejected(
        detail + "; nothing was written",
        errors=[{"row": 0, "key": None, "field": column, "reason": detail}],
    )


def _kind(value: Any) -> str:
    names = {dict: "an object", list: "an array", str: "a string", bool: "a boolean"}
    if value is None:
        return "null"
    if isinstance(value, int | float) and not isinstance(value, bool):
        return "a number"
    return names.get(type(value), type(value).__name__)
