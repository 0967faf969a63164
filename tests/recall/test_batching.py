"""Micro-batching of concurrent single-cue recalls."""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

from service.demo import demo_records, demo_schema
from service.recall.batching import RecallBatcher
from service.recall.errors import CueInvalid
from service.recall.models import CollectionSpec, RecallOptions, RecallResult
from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head


def _service(tmp_path: Path, window_ms: float) -> RecallService:
    settings = Settings(data_dir=tmp_path, recall_batch_window_ms=window_ms)
    upgrade_to_head(settings.resolved_database_url)
    service = RecallService(
        settings, make_session_factory(make_engine(settings.resolved_database_url))
    )
    return service


def _load(service: RecallService) -> list[tuple[str, dict[str, object]]]:
    service.create_collection(
        DEFAULT_TEAM, CollectionSpec(name="specimens", schema=demo_schema(), seed=11)
    )
    records = demo_records(n=300)
    service.import_memories(
        DEFAULT_TEAM, "specimens", [(i + 1, k, dict(f)) for i, (k, f) in enumerate(records)]
    )
    return [(k, dict(f)) for k, f in records]


class TestRecallBatcher:
    def test_concurrent_submissions_share_one_run_and_get_their_own_rows(self) -> None:
        batcher = RecallBatcher(max_batch=64)
        out: dict[int, int] = {}
        start = threading.Barrier(6)

        def one(i: int) -> None:
            start.wait()
            out[i] = batcher.submit(
                "k", np.array([i]), lambda m: [int(r[0]) * 10 for r in m], window=0.2
            )

        threads = [threading.Thread(target=one, args=(i,)) for i in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert out == {i: i * 10 for i in range(6)}
        assert batcher.rows_run == 6
        assert batcher.batches_run < 6

    def test_a_full_batch_runs_without_waiting_out_its_window(self) -> None:
        batcher = RecallBatcher(max_batch=1)
        # with max_batch 1 every submission is full at once; a 60 s window must not be waited
        assert batcher.submit("k", np.array([3]), lambda m: [int(m[0][0])], window=60.0) == 3

    def test_an_error_in_the_run_reaches_every_caller(self) -> None:
        batcher = RecallBatcher()

        def boom(m: np.ndarray) -> list[int]:
            raise RuntimeError("settle failed")

        with pytest.raises(RuntimeError, match="settle failed"):
            batcher.submit("k", np.array([1]), boom, window=0.0)


class TestBatchedRecall:
    def test_concurrent_single_cues_answer_exactly_as_one_by_one(self, tmp_path: Path) -> None:
        plain = _service(tmp_path / "a", window_ms=0.0)
        records = _load(plain)
        cues = [{"taxon": f["taxon"], "site_code": f["site_code"]} for _, f in records[:12]]
        expected = [plain.recall(DEFAULT_TEAM, "specimens", [c], RecallOptions())[0] for c in cues]

        batched = _service(tmp_path / "b", window_ms=50.0)
        _load(batched)
        batched.recall(DEFAULT_TEAM, "specimens", [cues[0]], RecallOptions())  # compile first
        got: dict[int, RecallResult] = {}
        start = threading.Barrier(len(cues))

        def one(i: int) -> None:
            start.wait()
            got[i] = batched.recall(DEFAULT_TEAM, "specimens", [cues[i]], RecallOptions())[0]

        threads = [threading.Thread(target=one, args=(i,)) for i in range(len(cues))]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert [got[i] for i in range(len(cues))] == expected
        assert batched._batcher.batches_run < len(cues) + 1

    def test_a_bad_cue_is_refused_alone(self, tmp_path: Path) -> None:
        service = _service(tmp_path, window_ms=50.0)
        records = _load(service)
        errors: list[BaseException] = []
        good: list[RecallResult] = []
        start = threading.Barrier(3)

        def one(cue: dict[str, object]) -> None:
            start.wait()
            try:
                good.extend(service.recall(DEFAULT_TEAM, "specimens", [cue], RecallOptions()))
            except CueInvalid as exc:
                errors.append(exc)

        cues: list[dict[str, object]] = [
            {"taxon": records[0][1]["taxon"]},
            {"tide": "low"},
            {"taxon": records[1][1]["taxon"]},
        ]
        threads = [threading.Thread(target=one, args=(c,)) for c in cues]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert len(errors) == 1
        assert len(good) == 2
