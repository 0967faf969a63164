"""Recall: one cue, or a batch answered in order, with the verdict on each."""

from __future__ import annotations

from typing import Any

import httpx
import pytest

from service.api.schemas import (
    DecodedFieldRead,
    NeighbourRead,
    RecallBatchRead,
    RecalledMemoryRead,
    RecallRead,
)
from service.settings import Settings

from .conftest import BASE, SEED, assert_problem

pytestmark = pytest.mark.anyio


async def recall(client: httpx.AsyncClient, cue: dict[str, Any], **options: Any) -> Any:
    r = await client.post(f"{BASE}/recall", json={"cue": cue, "options": options})
    assert r.status_code == 200, r.text
    return r.json()


class TestRecall:
    async def test_partial_cue_is_recalled_to_the_right_memory(
        self, seeded: httpx.AsyncClient
    ) -> None:
        body = await recall(seeded, {"collector": "Orla Finch", "depth_m": 11.0})
        assert body["verdict"] == "recalled"
        assert body["memory"] == {"key": "SMP-0004", "fields": SEED["memories"]["SMP-0004"]}

    async def test_misspelled_cue_is_recalled_to_the_right_memory(
        self, seeded: httpx.AsyncClient
    ) -> None:
        body = await recall(seeded, {"taxon": "Zostera marna", "site_code": "SMP-E2"})
        assert body["verdict"] == "recalled"
        assert body["memory"]["key"] == "SMP-0003"
        assert body["fields"]["taxon"]["value"] == "Zostera marina"

    async def test_cue_matching_two_memories_equally_is_spurious(
        self, seeded: httpx.AsyncClient
    ) -> None:
        # Ines Varga collected both SMP-0001 and SMP-0003; nothing else tells them apart.
        body = await recall(seeded, {"collector": "Ines Varga"})
        assert body["verdict"] == "spurious"
        assert body["memory"] is None
        assert {n["key"] for n in body["nearest"][:2]} == {"SMP-0001", "SMP-0003"}

    async def test_cue_matching_no_memory_is_spurious(self, seeded: httpx.AsyncClient) -> None:
        body = await recall(seeded, {"taxon": "Quercus robur", "collector": "Hal Penrose"})
        assert body["verdict"] == "spurious"
        assert body["memory"] is None

    async def test_one_step_on_a_partial_cue_is_unsettled(self, seeded: httpx.AsyncClient) -> None:
        body = await recall(seeded, {"taxon": "Mytilus edulis"}, max_steps=1)
        assert body["verdict"] == "unsettled"
        assert body["reason"] == "step_limit"
        assert body["converged"] is False

    async def test_energy_is_reported_when_asked(self, seeded: httpx.AsyncClient) -> None:
        body = await recall(seeded, {"taxon": "Mytilus edulis"}, include_energy=True, top_k=2)
        assert len(body["energy"]) >= 1
        assert len(body["nearest"]) == 2

    async def test_unknown_field_in_a_cue_is_named(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(f"{BASE}/recall", json={"cue": {"taxn": "Zostera marina"}})
        body = assert_problem(r, 422, "invalid-cue")
        assert body["field"] == "taxn"

    async def test_wrong_type_for_an_option_is_named(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(
            f"{BASE}/recall", json={"cue": {"taxon": "Zostera"}, "options": {"top_k": "three"}}
        )
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "options.top_k"

    async def test_cue_that_is_not_an_object_is_a_422(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(f"{BASE}/recall", json={"cue": "Zostera marina"})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "cue"

    async def test_steps_above_the_limit_names_the_limit(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(
            f"{BASE}/recall", json={"cue": {"taxon": "Zostera"}, "options": {"max_steps": 5000}}
        )
        body = assert_problem(r, 422, "limit-exceeded")
        assert body["limit"] == "max_steps"

    async def test_empty_collection_is_a_409(self, client: httpx.AsyncClient) -> None:
        await client.post("/v1/collections", json=SEED["collection"])
        r = await client.post(f"{BASE}/recall", json={"cue": {"taxon": "Zostera"}})
        assert_problem(r, 409, "collection-empty")

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.post(
            "/v1/collections/smp-nothing/recall", json={"cue": {"taxon": "Zostera"}}
        )
        assert_problem(r, 404, "collection-not-found")

    async def test_a_write_is_seen_by_the_next_recall(self, seeded: httpx.AsyncClient) -> None:
        fields = {
            "taxon": "Littorina littorea",
            "collector": "Maren Holt",
            "site_code": "SMP-N3",
            "collected_on": "2024-09-03",
            "depth_m": 0.8,
        }
        await recall(seeded, {"taxon": "Zostera marina"})  # compiles the current revision
        await seeded.put(f"{BASE}/memories/SMP-0007", json={"fields": fields})
        body = await recall(seeded, {"taxon": "Littorina litorea", "site_code": "SMP-N3"})
        assert body["verdict"] == "recalled"
        assert body["memory"]["key"] == "SMP-0007"


class TestRecallBatch:
    async def test_answers_come_in_the_order_of_the_cues(self, seeded: httpx.AsyncClient) -> None:
        cues = [
            {"taxon": "Mytilus edulus", "collector": "Tobias Wren"},
            {"collector": "Ines Varga"},
            {"site_code": "SMP-N3", "collected_on": "2024-08-10", "depth_m": 12.5},
        ]
        r = await seeded.post(f"{BASE}/recall:batch", json={"cues": cues})
        assert r.status_code == 200, r.text
        results = r.json()["results"]
        assert [x["verdict"] for x in results] == ["recalled", "spurious", "recalled"]
        assert [x["best_key"] for x in (results[0], results[2])] == ["SMP-0002", "SMP-0004"]

    async def test_empty_batch_is_a_422(self, seeded: httpx.AsyncClient) -> None:
        r = await seeded.post(f"{BASE}/recall:batch", json={"cues": []})
        body = assert_problem(r, 422, "invalid-request")
        assert body["errors"][0]["field"] == "cues"

    async def test_bad_cue_is_named_by_its_position(self, seeded: httpx.AsyncClient) -> None:
        cues = [{"taxon": "Zostera"}, {"depth_m": "deep"}]
        r = await seeded.post(f"{BASE}/recall:batch", json={"cues": cues})
        body = assert_problem(r, 422, "invalid-cue")
        assert body["cue"] == 1
        assert body["field"] == "depth_m"

    async def test_batch_over_the_limit_is_a_413(
        self, seeded: httpx.AsyncClient, settings: Settings
    ) -> None:
        limit = settings.max_batch
        cues = [{"site_code": "SMP-N3"}] * (limit + 1)
        r = await seeded.post(f"{BASE}/recall:batch", json={"cues": cues})
        body = assert_problem(r, 413, "limit-exceeded")
        assert body["limit"] == "max_batch"

    async def test_unknown_collection_is_a_404(self, client: httpx.AsyncClient) -> None:
        r = await client.post(
            "/v1/collections/smp-nothing/recall:batch", json={"cues": [{"taxon": "Zostera"}]}
        )
        assert_problem(r, 404, "collection-not-found")


async def test_answers_are_exactly_the_documented_models(seeded: httpx.AsyncClient) -> None:
    # the route writes the engine's result dataclasses as they are (service/api/routers/
    # recall.py): the response models in the OpenAPI document must read every answer back
    # unchanged, every field present, in the models' order
    exact = next(iter(SEED["memories"].values()))
    cues = [
        {"taxon": "Zostera marna", "site_code": "SMP-E2"},
        exact,
        {"collector": "Ines Varga"},
        {"depth_m": 499},
    ]
    answers = []
    for cue in cues:
        for options in ({}, {"include_energy": True, "top_k": 5}):
            r = await seeded.post(f"{BASE}/recall", json={"cue": cue, "options": options})
            assert r.status_code == 200, r.text
            answers.append(r.json())
    batch = await seeded.post(f"{BASE}/recall:batch", json={"cues": cues})
    body = batch.json()
    assert RecallBatchRead.model_validate(body).model_dump(mode="json") == body
    answers += body["results"]
    assert {a["verdict"] for a in answers} >= {"recalled"}
    assert any(a["memory"] is not None for a in answers)
    assert any(a["energy"] is not None for a in answers)
    for answer in answers:
        assert RecallRead.model_validate(answer).model_dump(mode="json") == answer
        assert list(answer) == list(RecallRead.model_fields)
        if answer["memory"] is not None:
            assert list(answer["memory"]) == list(RecalledMemoryRead.model_fields)
        for field in answer["fields"].values():
            assert list(field) == list(DecodedFieldRead.model_fields)
        for neighbour in answer["nearest"]:
            assert list(neighbour) == list(NeighbourRead.model_fields)
