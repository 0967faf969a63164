"""The ``cuebank`` command line and the demo data it loads."""

from __future__ import annotations

import argparse
import datetime
import random
import re
import socket
from collections import defaultdict
from pathlib import Path

import pytest

from service.cli import EXIT_OK, EXIT_SERVER, EXIT_USAGE, _demo_socket, build_parser, main
from service.demo import DEMO_SIZE, demo_records, demo_schema, smudge, typo
from service.engine.codec import Codec, Schema
from service.storage.migrate import head_revision

COMMANDS = ("serve", "migrate", "demo", "bench")


@pytest.fixture(autouse=True)
def _no_configured_database(monkeypatch: pytest.MonkeyPatch) -> None:
    # A developer's CUEBANK_DATABASE_URL must never be migrated by the test run.
    monkeypatch.delenv("CUEBANK_DATABASE_URL", raising=False)


def _subparser(name: str) -> argparse.ArgumentParser:
    parser = build_parser()
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            sub: argparse.ArgumentParser = action.choices[name]
            return sub
    raise AssertionError("cuebank has no subcommands")


class TestHelp:
    def test_top_level_help_lists_every_command_and_exit_code(
        self, capsys: pytest.CaptureFixture[str]
    ) -> None:
        with pytest.raises(SystemExit) as stop:
            main(["--help"])
        assert stop.value.code == EXIT_OK
        out = capsys.readouterr().out
        for command in COMMANDS:
            assert re.search(rf"^\s+{command}\s+\S", out, re.MULTILINE), command
        for code in ("0", "2", "3", "4"):
            assert re.search(rf"^\s+{code}\s+\w", out, re.MULTILINE), code

    @pytest.mark.parametrize("command", COMMANDS)
    def test_command_help_describes_every_option(
        self, command: str, capsys: pytest.CaptureFixture[str]
    ) -> None:
        with pytest.raises(SystemExit) as stop:
            main([command, "--help"])
        assert stop.value.code == EXIT_OK
        out = capsys.readouterr().out
        options = [a for a in _subparser(command)._actions if a.option_strings]
        assert len(options) > 1
        for action in options:
            assert action.help, f"{command} {action.option_strings} has no help text"
            assert action.option_strings[-1] in out
        assert "exit codes" in out


class TestUsageErrors:
    @pytest.mark.parametrize(
        "argv",
        [
            pytest.param([], id="no-command"),
            pytest.param(["launch"], id="unknown-command"),
            pytest.param(["serve", "--port", "eighty"], id="port-not-a-number"),
            pytest.param(["serve", "--workers", "0"], id="no-workers"),
            pytest.param(["demo", "--port", "70000"], id="port-out-of-range"),
            pytest.param(["migrate", "--colour"], id="unknown-option"),
        ],
    )
    def test_wrong_usage_exits_2_with_a_one_line_hint(
        self, argv: list[str], capsys: pytest.CaptureFixture[str]
    ) -> None:
        with pytest.raises(SystemExit) as stop:
            main(argv)
        assert stop.value.code == EXIT_USAGE
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1
        assert "--help" in err

    def test_an_invalid_setting_in_the_environment_is_a_usage_error(
        self, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
    ) -> None:
        monkeypatch.setenv("CUEBANK_PORT", "99999")
        assert main(["migrate", "--data-dir", "unused"]) == EXIT_USAGE
        assert "port" in capsys.readouterr().err


class TestMigrate:
    def test_migrate_upgrades_an_empty_data_dir_to_head_and_says_so(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(["migrate", "--data-dir", str(tmp_path)]) == EXIT_OK
        out = capsys.readouterr().out
        assert f"-> {head_revision()}" in out
        assert (tmp_path / "cuebank.sqlite3").is_file()

    def test_migrate_twice_is_a_no_op_the_second_time(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(["migrate", "--data-dir", str(tmp_path)]) == EXIT_OK
        capsys.readouterr()
        assert main(["migrate", "--data-dir", str(tmp_path)]) == EXIT_OK
        assert "nothing to do" in capsys.readouterr().out

    def test_serve_refuses_a_database_that_was_never_migrated(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(["serve", "--data-dir", str(tmp_path), "--port", "0"]) == EXIT_SERVER
        err = capsys.readouterr().err
        assert "cuebank migrate" in err
        assert len(err.strip().splitlines()) == 1


class TestDemoPort:
    def test_a_taken_port_falls_back_to_a_free_one_with_a_message(self) -> None:
        with socket.socket() as taken:
            taken.bind(("127.0.0.1", 0))
            taken.listen(1)
            port = taken.getsockname()[1]
            sock, note = _demo_socket(port)
            with sock:
                assert sock.getsockname()[1] != port
                assert note is not None
                assert str(port) in note
                assert "taken" in note

    def test_a_free_port_is_used_silently(self) -> None:
        sock, note = _demo_socket(0)
        with sock:
            assert note is None


class TestDemoRecords:
    def test_the_same_seed_gives_identical_records(self) -> None:
        assert demo_records(seed=5) == demo_records(seed=5)

    def test_another_seed_gives_other_records(self) -> None:
        assert demo_records(n=50, seed=5) != demo_records(n=50, seed=6)

    def test_the_default_registry_has_about_1500_specimens_with_unique_ids(self) -> None:
        records = demo_records()
        assert len(records) == DEMO_SIZE == 1500
        keys = [key for key, _ in records]
        assert len(set(keys)) == len(keys)
        assert all(re.fullmatch(r"SMP-20(19|2[0-5])-\d{5}", key) for key in keys)

    def test_every_record_is_valid_against_the_demo_schema(self) -> None:
        records = demo_records()
        codec = Codec(Schema.from_dict(demo_schema()), seed=0)
        patterns = codec.encode_records([fields for _, fields in records])
        assert patterns.shape == (len(records), codec.n_units)

    def test_the_specimen_year_matches_the_collection_date(self) -> None:
        for key, fields in demo_records():
            assert isinstance(fields["collected_on"], str)
            day = datetime.date.fromisoformat(fields["collected_on"])
            assert key.startswith(f"SMP-{day.year}-")
            assert datetime.date(2019, 1, 1) <= day <= datetime.date(2025, 12, 31)

    def test_collectors_work_at_a_few_sites_out_of_about_24(self) -> None:
        records = demo_records()
        sites_of: dict[object, set[object]] = defaultdict(set)
        for _, fields in records:
            sites_of[fields["collector"]].add(fields["site_code"])
        all_sites = set().union(*sites_of.values())
        assert 20 <= len(all_sites) <= 24
        assert max(len(sites) for sites in sites_of.values()) <= 4

    def test_taxa_cluster_by_depth(self) -> None:
        # Each taxon keeps to a band of the water column: its depth range is far narrower than
        # the registry's. 0.5 leaves room for the deep genera, whose bands are widest.
        records = demo_records()
        depths: dict[object, list[float]] = defaultdict(list)
        for _, fields in records:
            if isinstance(fields["depth_m"], float):
                depths[fields["taxon"]].append(fields["depth_m"])
        overall = max(max(d) for d in depths.values()) - min(min(d) for d in depths.values())
        widths = sorted(max(d) - min(d) for d in depths.values() if len(d) >= 5)
        assert widths[len(widths) // 2] < 0.5 * overall


class TestSmudge:
    def test_smudge_keeps_the_requested_number_of_fields_and_is_seeded(self) -> None:
        _, fields = demo_records(n=10)[3]
        first = smudge(fields, random.Random(42), keep=2)
        assert first == smudge(fields, random.Random(42), keep=2)
        assert len(first) == 2
        assert set(first) <= set(fields)

    def test_a_fragment_with_text_fields_has_exactly_one_typo(self) -> None:
        _, fields = demo_records(n=10)[0]
        cue = smudge(fields, random.Random(9), keep=5)
        changed = [
            name for name in ("taxon", "collector") if name in cue and cue[name] != fields[name]
        ]
        assert len(changed) == 1

    def test_depth_moves_by_at_most_half_the_tolerance(self) -> None:
        for key, fields in demo_records(n=200):
            if fields["depth_m"] is None:
                continue
            cue = smudge(fields, random.Random(key), keep=5)
            assert isinstance(cue["depth_m"], float)
            assert isinstance(fields["depth_m"], float)
            assert abs(cue["depth_m"] - fields["depth_m"]) <= 1.0 + 1e-9

    @pytest.mark.parametrize("seed", range(20))
    def test_a_typo_changes_the_text_by_one_edit(self, seed: int) -> None:
        text = "Pelella granoides"
        slipped = typo(text, random.Random(seed))
        assert slipped != text
        assert slipped[0] == text[0]
        assert abs(len(slipped) - len(text)) <= 1


@pytest.mark.slow
class TestDemoCommand:
    def test_demo_without_serving_loads_once_and_prints_a_working_example(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        argv = ["demo", "--no-serve", "--data-dir", str(tmp_path), "--port", "8123"]
        assert main(argv) == EXIT_OK
        first = capsys.readouterr().out
        assert "loaded the demo specimens" in first
        assert "http://127.0.0.1:8123/docs" in first
        assert "curl -s -X POST http://127.0.0.1:8123/v1/collections/specimens/recall" in first
        assert main(argv) == EXIT_OK
        second = capsys.readouterr().out
        assert "already there" in second
        # The example is chosen deterministically, so a second run prints the same request,
        # with a new key: only hashes are stored, so each run makes one and revokes the last.
        secret = re.compile(r"cb_[a-z0-9]{8}_[A-Za-z0-9_-]{43}")
        keys = [secret.findall(out) for out in (first, second)]
        assert len(set(keys[0])) == len(set(keys[1])) == 1
        assert keys[0][0] != keys[1][0]
        assert f"-H 'Authorization: Bearer {keys[1][0]}'" in second
        masked = [secret.sub("<key>", out).split("Recall specimen")[1] for out in (first, second)]
        assert masked[0] == masked[1]
