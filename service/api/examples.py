"""Examples for the OpenAPI document, kept as JSON files in ``openapi_examples/``.

One file per model, named after it (``RecallRequest.json``)::

    {"model": "RecallRequest",
     "examples": {"misspelled-taxon": {"summary": "...", "value": {...},
                                        "request": {"method": "POST", "path": "...",
                                                    "seed": "specimens", "status": 200}}}}

``request`` says how the example is sent and what it must answer; tests/test_openapi_examples.py
sends it. It is not part of an OpenAPI Example object and is dropped when the document is built.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path
from typing import Any

import service

__all__ = [
    "EXAMPLES_DIR",
    "example_files",
    "load_examples",
    "openapi_examples",
    "problem_examples",
    "response_examples",
]

EXAMPLES_DIR = Path(service.__file__).resolve().parents[1] / "openapi_examples"
_OPENAPI_MEMBERS = ("summary", "description", "value")


def example_files() -> list[Path]:
    return sorted(EXAMPLES_DIR.glob("*.json"))


@cache
def load_examples(model: str) -> dict[str, dict[str, Any]]:
    """The examples of ``model`` as stored, ``request`` members included."""
    path = EXAMPLES_DIR / f"{model}.json"
    doc = json.loads(path.read_text(encoding="utf-8"))
    if doc.get("model") != model:
        raise ValueError(f"{path} describes model {doc.get('model')!r}, expected {model!r}")
    examples: dict[str, dict[str, Any]] = doc["examples"]
    return examples


def openapi_examples(model: str) -> dict[str, Any]:
    """The examples of ``model`` as OpenAPI Example objects, for ``Body(openapi_examples=)``."""
    return {
        name: {k: v for k, v in example.items() if k in _OPENAPI_MEMBERS}
        for name, example in load_examples(model).items()
    }


def response_examples(model: str, *names: str) -> dict[str, Any]:
    """A ``responses=`` entry carrying the examples of ``model`` (only ``names``, if given)."""
    examples = openapi_examples(model)
    if names:
        examples = {name: examples[name] for name in names}
    return {"content": {"application/json": {"examples": examples}}}


def problem_examples(names: tuple[str, ...]) -> dict[int, dict[str, Any]]:
    """The named Problem examples, grouped by the status they are answered with."""
    stored = openapi_examples("Problem")
    unknown = sorted(set(names) - set(stored))
    if unknown:
        raise KeyError(f"no Problem example named {', '.join(unknown)}")
    by_status: dict[int, dict[str, Any]] = {}
    for name in names:
        by_status.setdefault(int(stored[name]["value"]["status"]), {})[name] = stored[name]
    return by_status
