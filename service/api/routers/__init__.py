"""One router per resource; :func:`problem_responses` declares the problem answers of a route."""

from __future__ import annotations

from http import HTTPStatus
from typing import Any

from service.api.examples import problem_examples
from service.api.schemas import Problem

__all__ = ["BODY_PROBLEMS", "problem_responses"]

#: Problems any route that reads a JSON body can answer with.
BODY_PROBLEMS = ("malformed-json", "malformed-body", "body-too-large", "invalid-request")


def problem_responses(*names: str) -> dict[int | str, dict[str, Any]]:
    """``responses=`` entries for the named Problem examples, plus the 500 every route has.

    The schema is declared as JSON here; the app's OpenAPI hook files it under
    ``application/problem+json``, the media type these answers really carry.
    """
    out: dict[int | str, dict[str, Any]] = {}
    for status, examples in sorted(problem_examples((*names, "internal")).items()):
        out[status] = {
            "model": Problem,
            "description": HTTPStatus(status).phrase,
            "content": {"application/json": {"examples": examples}},
        }
    return out
