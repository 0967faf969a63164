"""Warming the compiled-memory cache at start."""

from __future__ import annotations

from pathlib import Path

from service.demo import demo_records
from service.recall.models import CollectionSpec
from service.recall.service import DEFAULT_TEAM, RecallService
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory
from service.storage.migrate import upgrade_to_head


def _service(tmp_path: Path) -> RecallService:
    settings = Settings(data_dir=tmp_path)
    upgrade_to_head(settings.resolved_database_url)
    engine = make_engine(settings.resolved_database_url)
    return RecallService(settings, make_session_factory(engine))


class TestWarm:
    def test_every_compilable_collection_is_cached_and_empty_ones_are_skipped(
        self, tmp_path: Path
    ) -> None:
        service = _service(tmp_path)
        schema = {
            "fields": [{"name": "taxon", "kind": "text"}, {"name": "site", "kind": "category"}]
        }
        service.create_collection(DEFAULT_TEAM, CollectionSpec(name="full", schema=schema, seed=3))
        service.create_collection(DEFAULT_TEAM, CollectionSpec(name="empty", schema=schema, seed=4))
        rows = [
            (i + 1, key, {"taxon": fields["taxon"], "site": fields["site_code"]})
            for i, (key, fields) in enumerate(demo_records(n=40))
        ]
        service.import_memories(DEFAULT_TEAM, "full", rows)
        assert len(service.cache) == 0
        assert service.warm() == 1
        assert len(service.cache) == 1
