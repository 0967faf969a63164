"""Independent single-cue recalls settled together (``RecallService.recall_each``)."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.demo import demo_records, demo_schema
from service.recall.errors import CollectionNotFound, CueInvalid
from service.recall.models import CollectionSpec, RecallOptions, RecallResult
from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head


@pytest.fixture
def service(tmp_path: Path) -> RecallService:
    settings = Settings(data_dir=tmp_path)
    upgrade_to_head(settings.resolved_database_url)
    return RecallService(
        settings, make_session_factory(make_engine(settings.resolved_database_url))
    )


@pytest.fixture
def records(service: RecallService) -> list[tuple[str, dict[str, object]]]:
    service.create_collection(
        DEFAULT_TEAM, CollectionSpec(name="specimens", schema=demo_schema(), seed=11)
    )
    loaded = demo_records(n=300)
    service.import_memories(
        DEFAULT_TEAM, "specimens", [(i + 1, k, dict(f)) for i, (k, f) in enumerate(loaded)]
    )
    return [(k, dict(f)) for k, f in loaded]


@pytest.mark.parametrize("mode", ["sync", "async"])
@pytest.mark.parametrize("rule", ["dense", "hebbian", "storkey", "projection"])
def test_settled_together_each_answer_is_the_one_it_gets_alone(
    service: RecallService, mode: str, rule: str
) -> None:
    # Bit for bit: a cue's answer must not depend on the cues that happen to share its run.
    service.create_collection(
        DEFAULT_TEAM, CollectionSpec(name="specimens", schema=demo_schema(), rule=rule, seed=11)
    )
    loaded = demo_records(n=300 if rule == "dense" else 60)
    service.import_memories(
        DEFAULT_TEAM, "specimens", [(i + 1, k, dict(f)) for i, (k, f) in enumerate(loaded)]
    )
    records = [(k, dict(f)) for k, f in loaded]
    # Every kind of cue in one run: full, partial, one field, misspelled, unknown.
    cues: list[dict[str, object]] = []
    for i, (_, f) in enumerate(records[:24]):
        known = list(f)[: 1 + i % len(f)]
        cues.append({k: f[k] for k in known})
    cues.append({"taxon": str(records[3][1]["taxon"])[:-2] + "xx"})
    cues.append({"taxon": "Nothing anywhere"})
    options = RecallOptions(mode=mode, top_k=4, include_energy=True)
    alone = [service.recall(DEFAULT_TEAM, "specimens", [c], options)[0] for c in cues]
    together = service.recall_each(DEFAULT_TEAM, "specimens", cues, options)
    assert together == alone


def test_an_invalid_cue_is_refused_alone(
    service: RecallService, records: list[tuple[str, dict[str, object]]]
) -> None:
    cues: list[object] = [
        {"taxon": records[0][1]["taxon"]},
        {"tide": "low"},  # no such field
        "not an object",
        {"taxon": records[1][1]["taxon"]},
    ]
    out = service.recall_each(DEFAULT_TEAM, "specimens", cues, RecallOptions())
    assert [type(o) for o in out] == [RecallResult, CueInvalid, CueInvalid, RecallResult]
    # worded as for a cue sent alone
    with pytest.raises(CueInvalid) as alone:
        service.recall(DEFAULT_TEAM, "specimens", [cues[1]], RecallOptions())
    assert str(out[1]) == str(alone.value)
    for i in (0, 3):
        assert out[i] == service.recall(DEFAULT_TEAM, "specimens", [cues[i]], RecallOptions())[0]


def test_errors_of_the_collection_are_raised_for_all(service: RecallService) -> None:
    with pytest.raises(CollectionNotFound):
        service.recall_each(DEFAULT_TEAM, "nowhere", [{"taxon": "x"}], RecallOptions())


def test_a_batch_larger_than_one_run_is_settled_in_runs_with_the_same_answers(
    service: RecallService,
    records: list[tuple[str, dict[str, object]]],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # 40 cues through runs of 7 (five full runs and a short one) against one run of all 40.
    import service.recall.service as module

    cues = [{k: f[k] for k in list(f)[: 1 + i % len(f)]} for i, (_, f) in enumerate(records[:40])]
    options = RecallOptions(top_k=3, include_energy=True)
    whole = service.recall(DEFAULT_TEAM, "specimens", cues, options)
    ran: list[int] = []
    run = module.RecallService._execute_run

    def counted(self: RecallService, compiled: object, cue_matrix: object, *rest: object) -> object:
        ran.append(len(cue_matrix))  # type: ignore[arg-type]
        return run(self, compiled, cue_matrix, *rest)  # type: ignore[arg-type]

    monkeypatch.setattr(module, "RUN_CUES", 7)
    monkeypatch.setattr(module.RecallService, "_execute_run", counted)
    in_runs = service.recall(DEFAULT_TEAM, "specimens", cues, options)
    assert ran == [7, 7, 7, 7, 7, 5]
    assert in_runs == whole
