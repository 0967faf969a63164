"""API keys and the audit log: repositories, and the key use-cases on a real database."""

from __future__ import annotations

import multiprocessing
import os
import stat
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from pydantic import SecretStr
from sqlalchemy.orm import Session

from service.recall.auth import (
    TOUCH_INTERVAL,
    KeyService,
    PepperMissing,
    TeamExists,
    TeamNotFound,
    Unauthenticated,
    hash_secret,
    load_pepper,
    new_secret,
    parse_scopes,
    prefix_of,
)
from service.recall.auth import KeyNotFound as KeyMissing
from service.recall.errors import CursorInvalid, LimitExceeded, OptionInvalid
from service.settings import Settings
from service.storage.db import SessionFactory
from service.storage.errors import DuplicateNameError
from service.storage.keys import ApiKeyRepository, AuditRepository
from service.storage.models import ApiKey
from service.storage.repositories import TeamRepository

PEPPER = b"p" * 32
BEARER = "Bearer "


@pytest.fixture
def keys(session_factory: SessionFactory, tmp_path: Path) -> KeyService:
    settings = Settings(data_dir=tmp_path, default_page_size=2, max_page_size=3)
    service = KeyService(settings, session_factory, PEPPER)
    service.create_team("saltmarsh")
    service.create_team("harrow")
    return service


def _row(session_factory: SessionFactory, prefix: str) -> ApiKey:
    with session_factory() as session:
        row = ApiKeyRepository(session).get_by_prefix(prefix)
        assert row is not None
        return row


class TestSecretFormat:
    def test_a_secret_is_the_prefix_then_256_random_bits(self) -> None:
        prefix, secret = new_secret()
        assert prefix.startswith("cb_")
        assert len(prefix) == 11
        assert secret.startswith(prefix + "_")
        # token_urlsafe(32): 32 bytes in 43 base64url characters
        assert len(secret) == 11 + 1 + 43
        assert prefix_of(secret) == prefix

    def test_two_secrets_never_repeat(self) -> None:
        assert len({new_secret()[1] for _ in range(200)}) == 200

    @pytest.mark.parametrize(
        "text",
        [
            "",
            "cb_",
            "cb_ABCDEFGH_" + "a" * 43,
            "cb_abcdefgh_" + "a" * 42,
            "xx_abcdefgh_" + "a" * 43,
        ],
    )
    def test_a_malformed_secret_has_no_prefix(self, text: str) -> None:
        assert prefix_of(text) is None

    def test_the_stored_hash_depends_on_the_pepper(self) -> None:
        _, secret = new_secret()
        assert hash_secret(PEPPER, secret) != hash_secret(b"q" * 32, secret)
        assert secret not in hash_secret(PEPPER, secret)

    def test_scopes_are_canonical_and_checked(self) -> None:
        assert parse_scopes(["admin", "read"]) == ["read", "admin"]
        with pytest.raises(OptionInvalid):
            parse_scopes(["root"])
        with pytest.raises(OptionInvalid):
            parse_scopes([""])


class TestRepositories:
    def test_a_key_prefix_is_unique(self, session: Session) -> None:
        team = TeamRepository(session).create("saltmarsh")
        repo = ApiKeyRepository(session)
        fields = {"secret_hash": "0" * 64, "scopes": ["read"], "label": "", "expires_at": None}
        repo.create(team.id, prefix="cb_aaaaaaaa", **fields)  # type: ignore[arg-type]
        with pytest.raises(DuplicateNameError):
            repo.create(team.id, prefix="cb_aaaaaaaa", **fields)  # type: ignore[arg-type]

    def test_audit_pages_run_newest_first(self, session: Session) -> None:
        team = TeamRepository(session).create("saltmarsh")
        repo = AuditRepository(session)
        for i in range(5):
            repo.add(team.id, key_prefix="cli", action=f"a{i}")
        first = repo.page(team.id, None, 2)
        assert [e.action for e in first] == ["a4", "a3", "a2"]
        assert [e.action for e in repo.page(team.id, first[1].id, 2)] == ["a2", "a1", "a0"]

    def test_deleting_a_team_deletes_its_keys_and_audit(self, session: Session) -> None:
        team = TeamRepository(session).create("saltmarsh")
        ApiKeyRepository(session).create(
            team.id, prefix="cb_bbbbbbbb", secret_hash="0" * 64, scopes=["read"], label="",
            expires_at=None,
        )  # fmt: skip
        AuditRepository(session).add(team.id, key_prefix="cli", action="x")
        session.delete(team)
        session.flush()
        assert ApiKeyRepository(session).get_by_prefix("cb_bbbbbbbb") is None
        assert AuditRepository(session).page(team.id, None, 10) == []


class TestAuthenticate:
    def test_a_fresh_key_authenticates_as_its_team_with_its_scopes(self, keys: KeyService) -> None:
        info, secret = keys.create_key("saltmarsh", ["read", "write"], label="scanner")
        principal = keys.authenticate(BEARER + secret)
        assert (principal.team, principal.key_prefix) == ("saltmarsh", info.prefix)
        assert principal.scopes == frozenset({"read", "write"})

    def test_admin_includes_read_and_write_but_write_not_read(self, keys: KeyService) -> None:
        admin = keys.authenticate(BEARER + keys.create_key("saltmarsh", ["admin"])[1])
        writer = keys.authenticate(BEARER + keys.create_key("saltmarsh", ["write"])[1])
        assert all(admin.allows(s) for s in ("read", "write", "admin"))
        assert writer.allows("write")
        assert not writer.allows("read")
        assert not writer.allows("admin")

    def test_the_scheme_is_case_insensitive(self, keys: KeyService) -> None:
        _, secret = keys.create_key("saltmarsh", ["read"])
        assert keys.authenticate("bearer " + secret).team == "saltmarsh"

    @pytest.mark.parametrize(
        "header",
        [None, "", "Bearer", "Basic dXNlcjpwdw==", "Bearer not-a-key", "Token cb_x"],
    )
    def test_missing_or_malformed_headers_are_refused(
        self, keys: KeyService, header: str | None
    ) -> None:
        with pytest.raises(Unauthenticated):
            keys.authenticate(header)

    def test_a_key_with_one_character_changed_is_refused(self, keys: KeyService) -> None:
        _, secret = keys.create_key("saltmarsh", ["read"])
        tampered = secret[:-1] + ("A" if secret[-1] != "A" else "B")
        with pytest.raises(Unauthenticated):
            keys.authenticate(BEARER + tampered)

    def test_a_key_checked_under_another_pepper_is_refused(
        self, keys: KeyService, session_factory: SessionFactory
    ) -> None:
        _, secret = keys.create_key("saltmarsh", ["read"])
        other = KeyService(keys.settings, session_factory, b"z" * 32)
        with pytest.raises(Unauthenticated):
            other.authenticate(BEARER + secret)

    def test_a_revoked_key_is_refused_at_once(self, keys: KeyService) -> None:
        info, secret = keys.create_key("saltmarsh", ["read"])
        keys.revoke_key(info.prefix, team="saltmarsh")
        with pytest.raises(Unauthenticated):
            keys.authenticate(BEARER + secret)

    def test_an_expired_key_is_refused(
        self, keys: KeyService, session_factory: SessionFactory
    ) -> None:
        info, secret = keys.create_key("saltmarsh", ["read"], expires_in_days=1)
        with session_factory.begin() as session:
            row = ApiKeyRepository(session).get_by_prefix(info.prefix)
            assert row is not None
            row.expires_at = datetime.now(UTC) - timedelta(seconds=1)
        with pytest.raises(Unauthenticated):
            keys.authenticate(BEARER + secret)
        assert keys.list_keys("saltmarsh")[0].state == "expired"

    def test_last_use_is_written_at_most_once_a_minute(
        self, keys: KeyService, session_factory: SessionFactory
    ) -> None:
        info, secret = keys.create_key("saltmarsh", ["read"])
        assert _row(session_factory, info.prefix).last_used_at is None
        keys.authenticate(BEARER + secret)
        first = _row(session_factory, info.prefix).last_used_at
        assert first is not None
        keys.authenticate(BEARER + secret)
        assert _row(session_factory, info.prefix).last_used_at == first
        with session_factory.begin() as session:
            ApiKeyRepository(session).touch(_row(session_factory, info.prefix).id,
                                            first - TOUCH_INTERVAL)  # fmt: skip
        keys.authenticate(BEARER + secret)
        later = _row(session_factory, info.prefix).last_used_at
        assert later is not None
        assert later > first - TOUCH_INTERVAL


class TestKeysAndTeams:
    def test_only_the_hash_of_a_secret_is_stored(
        self, keys: KeyService, session_factory: SessionFactory
    ) -> None:
        info, secret = keys.create_key("saltmarsh", ["admin"])
        row = _row(session_factory, info.prefix)
        assert row.secret_hash == hash_secret(PEPPER, secret)
        assert secret not in repr(row)
        assert row.secret_hash not in repr(row)

    def test_a_team_keeps_several_live_keys_for_rotation(self, keys: KeyService) -> None:
        old, old_secret = keys.create_key("saltmarsh", ["read"], label="old")
        _, new_secret_ = keys.create_key("saltmarsh", ["read"], label="new")
        assert keys.authenticate(BEARER + old_secret).team == "saltmarsh"
        keys.revoke_key(old.prefix, team="saltmarsh")
        assert keys.authenticate(BEARER + new_secret_).team == "saltmarsh"
        assert [k.state for k in keys.list_keys("saltmarsh")] == ["revoked", "active"]

    def test_another_teams_key_cannot_be_revoked_and_looks_unknown(self, keys: KeyService) -> None:
        info, secret = keys.create_key("harrow", ["read"])
        with pytest.raises(KeyMissing) as caught:
            keys.revoke_key(info.prefix, team="saltmarsh")
        with pytest.raises(KeyMissing) as unknown:
            keys.revoke_key("cb_zzzzzzzz", team="saltmarsh")
        assert caught.value.detail.replace(info.prefix, "P") == unknown.value.detail.replace(
            "cb_zzzzzzzz", "P"
        )
        assert keys.authenticate(BEARER + secret).team == "harrow"

    def test_keys_need_an_existing_team_and_valid_options(self, keys: KeyService) -> None:
        with pytest.raises(TeamNotFound):
            keys.create_key("nowhere", ["read"])
        with pytest.raises(OptionInvalid):
            keys.create_key("saltmarsh", ["read"], expires_in_days=0)
        with pytest.raises(LimitExceeded):
            keys.create_key("saltmarsh", ["read"], label="x" * 129)
        with pytest.raises(OptionInvalid):
            keys.create_key("saltmarsh", ["read"], label="tab\there")

    def test_team_names_are_unique_and_checked(self, keys: KeyService) -> None:
        with pytest.raises(TeamExists):
            keys.create_team("saltmarsh")
        with pytest.raises(OptionInvalid):
            keys.create_team("Not A Name")

    def test_replacing_the_labelled_key_revokes_the_previous_one(self, keys: KeyService) -> None:
        _, first = keys.replace_labelled_key("saltmarsh", "demo", ["admin"])
        _, second = keys.replace_labelled_key("saltmarsh", "demo", ["admin"])
        with pytest.raises(Unauthenticated):
            keys.authenticate(BEARER + first)
        assert keys.authenticate(BEARER + second).team == "saltmarsh"


class TestAudit:
    def test_key_actions_are_audited_without_secrets(self, keys: KeyService) -> None:
        info, secret = keys.create_key("saltmarsh", ["read"], label="scanner")
        keys.revoke_key(info.prefix, team="saltmarsh")
        principal = keys.authenticate(BEARER + keys.create_key("saltmarsh", ["admin"])[1])
        page = keys.audit_page(principal.team_id, None, 3)
        assert [e.action for e in page.items] == ["key.create", "key.revoke", "key.create"]
        assert all(secret not in str(e) for e in page.items)

    def test_audit_pages_follow_the_cursor_and_stay_in_the_team(self, keys: KeyService) -> None:
        principal = keys.authenticate(BEARER + keys.create_key("saltmarsh", ["admin"])[1])
        for i in range(4):
            keys.record(principal, "memory.put", collection="c", memory_key=f"k{i}")
        keys.create_key("harrow", ["read"])
        seen: list[str | None] = []
        cursor = None
        while True:
            page = keys.audit_page(principal.team_id, cursor, None)
            seen += [e.memory_key for e in page.items]
            if page.next_cursor is None:
                break
            cursor = page.next_cursor
        assert seen == ["k3", "k2", "k1", "k0", None]

    def test_a_forged_cursor_or_an_oversized_page_is_refused(self, keys: KeyService) -> None:
        with pytest.raises(CursorInvalid):
            keys.audit_page(1, "bm90LWEtY3Vyc29y", None)
        with pytest.raises(LimitExceeded):
            keys.audit_page(1, None, 4)


def _pepper_or_error(data_dir: str) -> str:
    """The pepper a process reads from ``data_dir``, or the error it met."""
    try:
        return load_pepper(Settings(data_dir=Path(data_dir))).decode("ascii")
    except Exception as exc:
        return f"{type(exc).__name__}: {exc}"


class TestPepper:
    def test_sqlite_generates_a_private_pepper_once(self, tmp_path: Path) -> None:
        settings = Settings(data_dir=tmp_path / "data")
        first = load_pepper(settings)
        assert load_pepper(settings) == first
        assert len(first) >= 32
        mode = stat.S_IMODE(os.stat(tmp_path / "data" / "key_pepper").st_mode)
        assert mode == 0o600

    @pytest.mark.skipif(sys.platform != "linux", reason="forks the test process")
    def test_processes_starting_together_all_read_one_whole_pepper(self, tmp_path: Path) -> None:
        # Workers starting on a new data directory each try to write the pepper; one reading
        # the file between another's create and write used to find it empty and not start.
        context = multiprocessing.get_context("fork")
        with context.Pool(6) as pool:
            for attempt in range(12):
                data_dir = str(tmp_path / f"data-{attempt}")
                outcomes = pool.map(_pepper_or_error, [data_dir] * 12)
                assert len(set(outcomes)) == 1, outcomes
                assert len(outcomes[0]) == 64, outcomes[0]
                assert os.listdir(data_dir) == ["key_pepper"]  # no draft left behind

    def test_a_configured_pepper_wins(self, tmp_path: Path) -> None:
        settings = Settings(data_dir=tmp_path, key_pepper=SecretStr("k" * 40))
        assert load_pepper(settings) == b"k" * 40
        assert not (tmp_path / "key_pepper").exists()

    def test_postgresql_needs_a_configured_pepper(self, tmp_path: Path) -> None:
        settings = Settings(data_dir=tmp_path, database_url="postgresql+psycopg://u@h/db")
        with pytest.raises(PepperMissing, match="CUEBANK_KEY_PEPPER"):
            load_pepper(settings)

    def test_a_short_pepper_is_a_settings_error(self, tmp_path: Path) -> None:
        with pytest.raises(ValueError, match="at least 32"):
            Settings(data_dir=tmp_path, key_pepper=SecretStr("short"))
