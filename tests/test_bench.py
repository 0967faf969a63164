"""``cuebank bench``: the shape of its report, never its speed."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from typing import Any

import pytest

from service.bench import SECTIONS, parse_sections


class TestSectionChoice:
    def test_letters_and_names_select_the_same_sections_in_report_order(self) -> None:
        assert parse_sections("g,a,dense") == ("ceiling", "dense", "growth")

    def test_no_choice_means_every_section(self) -> None:
        assert parse_sections(None) == SECTIONS

    def test_an_unknown_section_is_named_in_the_error(self) -> None:
        with pytest.raises(ValueError, match="'zz'"):
            parse_sections("a,zz")


def _numbers_in(rows: list[dict[str, Any]]) -> list[float]:
    return [v for r in rows for v in r.values() if isinstance(v, int | float)]


@pytest.fixture(scope="module")
def report() -> dict[str, Any]:
    """One quick run, shared: its figures are checked for shape, never for speed."""
    done = subprocess.run(
        [sys.executable, "-m", "service.cli", "bench", "--quick", "--json"],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    doc: dict[str, Any] = json.loads(done.stdout)
    return doc


@pytest.mark.slow
class TestQuickRun:
    def test_every_section_is_present_with_figures_or_a_reason(
        self, report: dict[str, Any]
    ) -> None:
        assert list(report["sections"]) == list(SECTIONS)
        for name, sec in report["sections"].items():
            if sec["skipped"] is not None:
                assert sec["skipped"].startswith("not measured: "), name
                continue
            numbers = _numbers_in(sec["rows"])
            assert numbers, name
            assert all(math.isfinite(x) for x in numbers), name

    def test_the_machine_and_the_thread_count_are_described(self, report: dict[str, Any]) -> None:
        machine = report["machine"]
        assert machine["cpu_count"] >= 1
        assert machine["numpy"]
        assert "blas" in machine["blas"]
        assert "threads" in machine["blas_threads"]

    def test_the_parameters_say_it_was_a_quick_run(self, report: dict[str, Any]) -> None:
        assert report["parameters"]["quick"] is True
        assert report["parameters"]["batch"] == 256

    def test_ratios_are_positive_and_targets_say_whether_they_are_met(
        self, report: dict[str, Any]
    ) -> None:
        for name in ("recall", "dense", "compile", "memory"):
            for row in report["sections"][name]["rows"]:
                assert row["ratio"] > 0, (name, row)
        assert report["targets"]
        for target in report["targets"]:
            assert isinstance(target["met"], bool)
            assert target["value"] > 0

    def test_dense_answers_agree_with_the_exact_pass_as_a_fraction(
        self, report: dict[str, Any]
    ) -> None:
        for row in report["sections"]["dense"]["rows"]:
            assert 0.0 <= row["agreement"] <= 1.0

    def test_http_reports_rates_latencies_and_failures_or_why_not(
        self, report: dict[str, Any]
    ) -> None:
        sec = report["sections"]["http"]
        if sec["skipped"] is not None:
            # a machine where no server can start still gets a reason, never a silent gap
            assert sec["skipped"].startswith("not measured: ")
            return
        assert sec["summary"]["generator"]
        assert sec["summary"]["non_2xx_total"] == sum(r["non_2xx"] for r in sec["rows"])
        endpoints = {r["endpoint"].split(" (")[0] for r in sec["rows"]}
        assert endpoints == {"GET /healthz", "POST recall", "POST recall:batch"}
        for row in sec["rows"]:
            assert row["generator"] == sec["summary"]["generator"]
            assert row["requests"] > 0
            assert row["requests_per_second"] > 0
            assert 0 < row["p50_ms"] <= row["p99_ms"]
            assert row["ratio"] > 0
            assert isinstance(row["non_2xx"], int)
            assert row["non_2xx"] >= 0
        batch = [r for r in sec["rows"] if r["endpoint"].startswith("POST recall:batch")]
        assert all(r["cues_per_second"] > r["requests_per_second"] for r in batch)
        # a modest batch and a large one, each read against the engine run on the same
        # batches in as many processes at once
        sizes = sorted(int(r["endpoint"].split("(")[1].rstrip(")")) for r in batch)
        assert sorted(set(sizes)) == [64, 256]
        for size in set(sizes):
            side_by_side = [
                v
                for k, v in sec["summary"].items()
                if k.startswith("in_process_") and k.endswith(f"p_{size}_cues_per_second")
            ]
            assert side_by_side
            assert all(v > 0 for v in side_by_side)
        assert all(r["ratio_to"].startswith("in-process") for r in batch)

    def test_growth_reports_a_fitted_exponent_for_each_family(self, report: dict[str, Any]) -> None:
        summary = report["sections"]["growth"]["summary"]
        assert math.isfinite(summary["dense_exponent_in_P"])
        assert math.isfinite(summary["hebbian_exponent_in_N_per_step"])
