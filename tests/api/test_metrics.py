"""Prometheus metrics at /metrics."""

from __future__ import annotations

import httpx
import pytest

from .conftest import BASE, SEED

pytestmark = pytest.mark.anyio


def _sample(text: str, name: str, **labels: str) -> float:
    """The value of one sample in the Prometheus text format (0 if absent)."""
    want = ",".join(f'{k}="{v}"' for k, v in sorted(labels.items()))
    for line in text.splitlines():
        if line.startswith("#") or not line.startswith(name):
            continue
        head, _, value = line.rpartition(" ")
        if head == name and not labels:
            return float(value)
        if head.startswith(name + "{"):
            got = ",".join(sorted(head[len(name) + 1 : -1].split(",")))
            if got == want:
                return float(value)
    return 0.0


class TestMetrics:
    async def test_needs_no_key_and_is_the_prometheus_text_format(
        self, client: httpx.AsyncClient
    ) -> None:
        r = await client.get("/metrics", headers={"Authorization": ""})
        assert r.status_code == 200
        assert r.headers["content-type"].startswith("text/plain")
        assert "# TYPE cuebank_requests_total counter" in r.text

    async def test_requests_are_counted_by_route_template_not_by_name(
        self, seeded: httpx.AsyncClient
    ) -> None:
        await seeded.get(f"{BASE}")
        text = (await seeded.get("/metrics")).text
        assert (
            _sample(
                text,
                "cuebank_requests_total",
                method="GET",
                route="/v1/collections/{name}",
                status="200",
            )
            >= 1
        )
        assert SEED["collection"]["name"] not in text

    async def test_recall_verdicts_and_cache_size_are_reported(
        self, seeded: httpx.AsyncClient
    ) -> None:
        key, fields = next(iter(SEED["memories"].items()))
        r = await seeded.post(f"{BASE}/recall", json={"cue": fields})
        assert r.status_code == 200, r.text
        verdict, reason = r.json()["verdict"], r.json()["reason"]
        text = (await seeded.get("/metrics")).text
        assert _sample(text, "cuebank_recall_verdicts_total", verdict=verdict, reason=reason) == 1
        assert _sample(text, "cuebank_compiled_cache_collections") == 1
        assert _sample(text, "cuebank_compiled_cache_bytes") > 0
        del key
