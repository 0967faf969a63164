"""The HTTP part of ``cuebank bench`` (section d)."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from service.bench import BenchConfig, Section

__all__ = ["measure"]


def measure(cfg: BenchConfig, sec: Section) -> Section:
    """Fill ``sec`` with the HTTP figures, or say why they were not measured."""
    sec.skipped = (
        "not measured: the HTTP section (a uvicorn server on 127.0.0.1 driven by wrk or a "
        "multi-process httpx client) is not implemented yet; this hook is where it goes"
    )
    return sec
