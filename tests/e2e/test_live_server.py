"""End to end: a client talking HTTP to a real server, across a restart.

The scenario is an invented tool library (the Harrow Lane Tool Library) lending out hand tools;
a returned tool's tag is often half torn off, so staff look it up from what is left.
"""

from __future__ import annotations

import random
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

import httpx
import pytest

from service.cli import EXIT_OK, main
from service.demo import DEMO_COLLECTION, demo_records, smudge


class LiveServer(Protocol):
    """What the tests use of conftest's server (test modules cannot import a conftest)."""

    data_dir: Path
    key: str | None

    @property
    def headers(self) -> dict[str, str]: ...

    @property
    def url(self) -> str: ...
    def start(self) -> None: ...
    def stop(self) -> None: ...
    def restart(self) -> None: ...


pytestmark = pytest.mark.slow

COLLECTION = "tools"
# A fixed codec seed: the verdicts below were checked with it, and must not vary by run.
SEED = 4_211_907
SCHEMA: dict[str, Any] = {
    "fields": [
        {"name": "name", "kind": "text", "units": 512},
        {"name": "maker", "kind": "text", "units": 512},
        {"name": "shelf", "kind": "category", "units": 128},
        {"name": "weight_kg", "kind": "number", "tolerance": 0.5, "minimum": 0, "maximum": 60},
        {"name": "acquired", "kind": "date", "tolerance_days": 30},
    ]
}
TOOLS: dict[str, dict[str, Any]] = {
    "HL-0001": {"name": "claw hammer", "maker": "Brindlecote", "shelf": "A1",
                "weight_kg": 0.7, "acquired": "2019-03-02"},
    "HL-0002": {"name": "tenon saw", "maker": "Orrin & Vale", "shelf": "A2",
                "weight_kg": 0.9, "acquired": "2019-05-20"},
    "HL-0003": {"name": "spirit level", "maker": "Quenby Works", "shelf": "B1",
                "weight_kg": 1.4, "acquired": "2020-01-11"},
    "HL-0004": {"name": "cordless drill", "maker": "Talloway", "shelf": "C3",
                "weight_kg": 2.1, "acquired": "2021-08-30"},
    "HL-0005": {"name": "wallpaper steamer", "maker": "Pellingham", "shelf": "D2",
                "weight_kg": 4.8, "acquired": "2018-11-14"},
    "HL-0006": {"name": "hedge trimmer", "maker": "Greywether", "shelf": "E1",
                "weight_kg": 3.6, "acquired": "2022-04-09"},
    "HL-0007": {"name": "tile cutter", "maker": "Brindlecote", "shelf": "B4",
                "weight_kg": 6.2, "acquired": "2020-09-17"},
    "HL-0008": {"name": "sack truck", "maker": "Mossford", "shelf": "F1",
                "weight_kg": 14.0, "acquired": "2017-06-25"},
    "HL-0009": {"name": "pipe wrench", "maker": "Orrin & Vale", "shelf": "A3",
                "weight_kg": 1.8, "acquired": "2023-02-03"},
    "HL-0010": {"name": "carpet stretcher", "maker": "Quenby Works", "shelf": "D4",
                "weight_kg": 5.5, "acquired": "2016-10-01"},
    "HL-0011": {"name": "soldering iron", "maker": "Talloway", "shelf": "C1",
                "weight_kg": 0.4, "acquired": "2024-01-19"},
    "HL-0012": {"name": "log splitter", "maker": "Greywether", "shelf": "F3",
                "weight_kg": 38.0, "acquired": "2015-12-12"},
}  # fmt: skip
# Two loppers bought together, shelved together: identical on name, maker and shelf.
TWINS: dict[str, dict[str, Any]] = {
    "HL-0101": {"name": "bypass loppers", "maker": "Mossford", "shelf": "E2",
                "weight_kg": 1.1, "acquired": "2022-05-01"},
    "HL-0102": {"name": "bypass loppers", "maker": "Mossford", "shelf": "E2",
                "weight_kg": 1.1, "acquired": "2022-05-01"},
}  # fmt: skip


def _ok(response: httpx.Response) -> Any:
    assert response.is_success, f"{response.status_code}: {response.text}"
    return response.json()


def _stock(client: httpx.Client, tools: dict[str, dict[str, Any]]) -> None:
    _ok(client.post("/v1/collections", json={"name": COLLECTION, "schema": SCHEMA, "seed": SEED}))
    for key, fields in tools.items():
        _ok(client.put(f"/v1/collections/{COLLECTION}/memories/{key}", json={"fields": fields}))


def _recall(client: httpx.Client, cue: dict[str, Any], **options: Any) -> dict[str, Any]:
    body = {"cue": cue, "options": options}
    result: dict[str, Any] = _ok(client.post(f"/v1/collections/{COLLECTION}/recall", json=body))
    return result


class TestRecallOverHttp:
    @pytest.mark.parametrize(
        ("key", "cue"),
        [
            pytest.param("HL-0004", {"name": "cordless drill", "shelf": "C3"}, id="two-fields"),
            pytest.param("HL-0011", {"name": "soldring iron"}, id="one-field-typo"),
            pytest.param("HL-0007", {"name": "tile cuter", "shelf": "B4"}, id="typo"),
            pytest.param(
                "HL-0010", {"name": "carpet strecher", "weight_kg": 5.3}, id="typo-and-weight"
            ),
        ],
    )
    def test_a_partial_or_misspelled_cue_is_recalled_to_its_memory(
        self, client: httpx.Client, key: str, cue: dict[str, Any]
    ) -> None:
        _stock(client, TOOLS)
        result = _recall(client, cue)
        assert result["verdict"] == "recalled", result
        assert result["memory"]["key"] == key
        assert result["memory"]["fields"] == TOOLS[key]

    def test_a_cue_fitting_two_identical_memories_is_spurious(self, client: httpx.Client) -> None:
        _stock(client, {**TOOLS, **TWINS})
        result = _recall(client, {"name": "bypass loppers", "shelf": "E2"})
        assert result["verdict"] == "spurious", result
        assert result["memory"] is None
        assert {n["key"] for n in result["nearest"][:2]} == set(TWINS)

    def test_a_cue_fitting_no_memory_is_spurious(self, client: httpx.Client) -> None:
        _stock(client, TOOLS)
        result = _recall(client, {"name": "velvet harpsichord", "maker": "Zyndrel", "shelf": "Q9"})
        assert result["verdict"] == "spurious", result
        assert result["memory"] is None

    def test_a_one_step_limit_leaves_the_cue_unsettled(self, client: httpx.Client) -> None:
        _stock(client, TOOLS)
        result = _recall(client, {"name": "tenon saw"}, max_steps=1)
        assert result["verdict"] == "unsettled", result
        assert result["memory"] is None
        assert result["steps"] == 1


class TestRestart:
    def test_a_restart_keeps_every_memory_and_answers_the_same(
        self, live_server: LiveServer
    ) -> None:
        cue = {"name": "hedge trimer", "shelf": "E1"}
        with httpx.Client(
            base_url=live_server.url, timeout=60.0, headers=live_server.headers
        ) as client:
            _stock(client, TOOLS)
            compiled = _ok(client.post(f"/v1/collections/{COLLECTION}/compile"))
            before = _recall(client, cue)
        live_server.restart()
        with httpx.Client(
            base_url=live_server.url, timeout=60.0, headers=live_server.headers
        ) as client:
            # The first recall after the restart compiles from the database again.
            after = _recall(client, cue)
            recompiled = _ok(client.post(f"/v1/collections/{COLLECTION}/compile"))
            page = _ok(client.get(f"/v1/collections/{COLLECTION}/memories"))
        assert recompiled["checksum"] == compiled["checksum"]
        assert recompiled["revision"] == compiled["revision"]
        assert {item["key"]: item["fields"] for item in page["items"]} == TOOLS
        assert after == before
        assert after["verdict"] == "recalled"
        assert after["memory"]["key"] == "HL-0006"


class TestDemoOverHttp:
    def test_the_demo_collection_loads_and_recalls_smudged_fragments(
        self, start_server: Callable[[], LiveServer]
    ) -> None:
        server = start_server()
        server.stop()
        assert main(["demo", "--no-serve", "--data-dir", str(server.data_dir)]) == EXIT_OK
        server.start()
        records = demo_records()
        rng = random.Random(11)
        fragments = [(key, smudge(fields, rng, keep=4)) for key, fields in records[::100]]
        with httpx.Client(base_url=server.url, timeout=120.0, headers=server.headers) as client:
            info = _ok(client.get(f"/v1/collections/{DEMO_COLLECTION}"))
            answers = [
                _ok(client.post(f"/v1/collections/{DEMO_COLLECTION}/recall", json={"cue": cue}))
                for _, cue in fragments
            ]
        assert info["n_memories"] == len(records)
        recalled = [
            (key, answer["memory"]["key"])
            for (key, _), answer in zip(fragments, answers, strict=True)
            if answer["verdict"] == "recalled"
        ]
        # A wrong specimen is the failure that matters, so none is allowed. The demo registry
        # is correlated on purpose (collectors keep to a few sites, taxa to a depth band), so
        # many four-field fragments fit several specimens and are rightly not recalled; about
        # half were recalled when this was written, a third is the floor.
        assert all(expected == got for expected, got in recalled), recalled
        assert len(recalled) >= len(fragments) // 3
