"""The request-body checks against Python's own JSON parser as the reference."""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.api.bodies import (
    _JSON_STRING,
    UNPARSED,
    _outside_strings,
    check_json,
    json_depth_over,
    strict_json_loads,
)
from service.api.errors import MalformedJson
from service.recall.errors import LimitExceeded

REFUSED = object()

# Strings full of the characters the scan must not be fooled by.
TRICKY = st.text(alphabet=st.sampled_from(list('[]{}"\\ab\n')), max_size=8)
VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | TRICKY,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(TRICKY, inner, max_size=3),
    max_leaves=40,
)


def _depth(value: Any) -> int:
    if isinstance(value, list):
        return 1 + max((_depth(v) for v in value), default=0)
    if isinstance(value, dict):
        return 1 + max((_depth(v) for v in value.values()), default=0)
    return 0


@settings(max_examples=300, deadline=None)
@given(VALUES, st.integers(min_value=0, max_value=8), st.booleans())
def test_depth_scan_agrees_with_the_parsed_value(
    value: Any, maximum: int, ascii_only: bool
) -> None:
    body = json.dumps(value, ensure_ascii=ascii_only).encode("utf-8")
    assert json_depth_over(body, maximum) == (_depth(json.loads(body)) > maximum)


@settings(max_examples=300, deadline=None)
@given(VALUES, st.booleans())
def test_cutting_strings_by_quotes_agrees_with_the_string_pattern(
    value: Any, ascii_only: bool
) -> None:
    # the split on quotes (no backslash in the body) against the JSON string pattern, on
    # bodies with and without escapes
    body = json.dumps(value, ensure_ascii=ascii_only).encode("utf-8")
    assert _outside_strings(body) == _JSON_STRING.sub(b"", body)


# Documents with the numbers a second parser could read otherwise: big and negative integers,
# floats near the double's edges, and keys that collide once duplicates are spliced in.
NUMBERS = (
    st.integers(min_value=-(10**30), max_value=10**30)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.sampled_from([0.0, -0.0, 1e308, 5e-324, 2**63, 2**64, -(2**63) - 1])
)
KEYS = st.sampled_from(["a", "b", "cue", "\u00e9", "x:y", '"q"'])
DOCUMENTS = st.recursive(
    st.none() | st.booleans() | NUMBERS | TRICKY,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(KEYS, inner, max_size=3),
    max_leaves=30,
)


def _same_types(a: Any, b: Any) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same_types(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same_types(x, y) for x, y in zip(a, b, strict=True))
    return bool(a == b or (isinstance(a, float) and str(a) == str(b)))


@settings(max_examples=400, deadline=None)
@given(DOCUMENTS, st.integers(min_value=1, max_value=6), st.booleans(), st.booleans())
def test_a_document_parsed_once_is_what_the_strict_parser_reads(
    value: Any, maximum: int, ascii_only: bool, duplicate: bool
) -> None:
    # check_json hands on orjson's document only where it is exactly what Python's strict
    # reader gives (the reference): same values, same types (an int stays an int), same
    # member order; a duplicated member, too deep a body and other doubts take the careful
    # path and its own answer
    body = json.dumps(value, ensure_ascii=ascii_only).encode("utf-8")
    if duplicate and body.startswith(b"{") and body != b"{}":
        body = b'{"a": 1, "a": 2, ' + body[1:]
    try:
        reference: Any = strict_json_loads(body)
    except ValueError:
        reference = REFUSED
    try:
        got = check_json(body, maximum)
    except (LimitExceeded, MalformedJson):
        got = REFUSED
    if got is UNPARSED:
        return  # the careful path decided; its answers are the ones tested elsewhere
    if _depth(value) > maximum or reference is REFUSED:
        assert got is REFUSED
    else:
        assert _same_types(got, reference), (got, reference)


def test_the_careful_path_still_names_duplicates_and_depth() -> None:
    with pytest.raises(MalformedJson, match="appears twice"):
        check_json(b'{"cue": {"a": 1, "a": 2}}', 8)
    # an escaped colon in the kept value must not make up for the dropped member
    with pytest.raises(MalformedJson, match="appears twice"):
        check_json(b'{"a": 1, "a": "\\u003a"}', 8)
    with pytest.raises(LimitExceeded, match="max_json_depth"):
        check_json(b"[[[[[1]]]]]", 4)
    assert check_json(b'{"n": 123456789012345678901234567890}', 8) is UNPARSED
    assert check_json(b'{"cue": {"a": "x: y", "b": [1, 2.5]}}', 8) == {
        "cue": {"a": "x: y", "b": [1, 2.5]}
    }
