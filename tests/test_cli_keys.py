"""``cuebank team`` and ``cuebank key``: bootstrapping keys straight on the database."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service.cli import EXIT_OK, EXIT_SERVER, EXIT_USAGE, main

SECRET_RE = re.compile(r"cb_[a-z0-9]{8}_[A-Za-z0-9_-]{43}")


@pytest.fixture(autouse=True)
def _no_configured_database(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("CUEBANK_DATABASE_URL", raising=False)
    monkeypatch.delenv("CUEBANK_KEY_PEPPER", raising=False)


@pytest.fixture
def data_dir(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> Path:
    assert main(["migrate", "--data-dir", str(tmp_path)]) == EXIT_OK
    assert main(["team", "create", "saltmarsh", "--data-dir", str(tmp_path)]) == EXIT_OK
    capsys.readouterr()
    return tmp_path


def _create(data_dir: Path, *extra: str) -> list[str]:
    return ["key", "create", "--team", "saltmarsh", "--data-dir", str(data_dir), *extra]


class TestKeyCommands:
    def test_a_key_is_printed_once_and_only_its_hash_is_stored(
        self, data_dir: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        argv = _create(data_dir, "--scopes", "read,write", "--label", "scanner")
        assert main(argv) == EXIT_OK
        out = capsys.readouterr().out
        [secret] = SECRET_RE.findall(out)
        prefix = secret[:11]
        assert main(["key", "list", "--team", "saltmarsh", "--data-dir", str(data_dir)]) == 0
        listed = capsys.readouterr().out
        assert prefix in listed
        assert "read,write" in listed
        assert "scanner" in listed
        assert secret not in listed
        stored = b"".join(p.read_bytes() for p in data_dir.glob("cuebank.sqlite3*"))
        assert secret.encode() not in stored
        assert prefix.encode() in stored

    def test_a_revoked_key_is_listed_as_revoked(
        self, data_dir: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(_create(data_dir, "--scopes", "admin", "--expires-in-days", "7")) == EXIT_OK
        prefix = SECRET_RE.findall(capsys.readouterr().out)[0][:11]
        assert main(["key", "revoke", prefix, "--data-dir", str(data_dir)]) == EXIT_OK
        assert "revoked" in capsys.readouterr().out
        assert main(["key", "list", "--team", "saltmarsh", "--data-dir", str(data_dir)]) == 0
        assert re.search(rf"{prefix}\s+revoked\s+admin", capsys.readouterr().out)

    @pytest.mark.parametrize(
        ("argv", "message"),
        [
            pytest.param(["--scopes", "root"], "unknown scope 'root'", id="unknown-scope"),
            pytest.param(["--scopes", ""], "at least one scope", id="no-scope"),
            pytest.param(["--scopes", "read", "--expires-in-days", "0"], "expires_in_days",
                         id="bad-expiry"),
        ],
    )  # fmt: skip
    def test_bad_options_exit_2_with_the_reason(
        self, data_dir: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
    ) -> None:
        assert main(_create(data_dir, *argv)) == EXIT_USAGE
        assert message in capsys.readouterr().err

    def test_an_unknown_team_or_prefix_exits_2(
        self, data_dir: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        argv = ["key", "create", "--team", "nowhere", "--scopes", "read"]
        assert main([*argv, "--data-dir", str(data_dir)]) == EXIT_USAGE
        assert "no team 'nowhere'" in capsys.readouterr().err
        assert main(["key", "revoke", "cb_zzzzzzzz", "--data-dir", str(data_dir)]) == EXIT_USAGE

    def test_a_team_name_is_taken_once(
        self, data_dir: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(["team", "create", "saltmarsh", "--data-dir", str(data_dir)]) == EXIT_USAGE
        assert "already exists" in capsys.readouterr().err

    def test_an_unmigrated_database_is_refused(
        self, tmp_path: Path, capsys: pytest.CaptureFixture[str]
    ) -> None:
        assert main(["team", "create", "saltmarsh", "--data-dir", str(tmp_path)]) == EXIT_SERVER
        assert "cuebank migrate" in capsys.readouterr().err
