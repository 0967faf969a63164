"""The request-body checks against Python's own JSON parser as the reference."""

from __future__ import annotations

import json
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from service.api.bodies import json_depth_over

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
