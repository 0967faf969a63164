"""The practitioner's toolkit against a live server: the client, the CLI, reconciliation jobs."""

from __future__ import annotations

import csv
import io
import json
import os
import random
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service import client as cb
from service.demo import DEMO_CODEC_SEED, demo_records, demo_schema, smudge
from service.recall.auth import KeyService, load_pepper
from service.settings import Settings
from service.storage.db import make_engine, make_session_factory

from .conftest import LiveServer

ROOT = Path(__file__).resolve().parents[2]
TEAM = "saltmarsh"
FIELDS = [f["name"] for f in demo_schema()["fields"]]
#: Rows of the import and reconciliation files: several thousand, as a real label backlog.
N_ROWS = 3000


def make_key(server: LiveServer, scopes: tuple[str, ...] = ("read", "write", "admin")) -> str:
    settings = Settings(data_dir=server.data_dir)
    engine = make_engine(settings.resolved_database_url)
    try:
        keys = KeyService(settings, make_session_factory(engine), load_pepper(settings))
        keys.ensure_team(TEAM)
        _, secret = keys.create_key(TEAM, scopes, label="toolkit test")
        return secret
    finally:
        engine.dispose()


def cli(
    server: LiveServer, key: str, *args: str, cwd: Path | None = None
) -> subprocess.CompletedProcess[str]:
    """Run ``cuebank ARGS`` in a new process, as a user would."""
    env = {**os.environ, "CUEBANK_URL": server.url, "CUEBANK_KEY": key, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-c", "import sys; from service.cli import main; sys.exit(main())", *args],
        capture_output=True,
        text=True,
        env=env,
        cwd=cwd,
        timeout=240,
    )


def collection_spec(name: str) -> dict[str, Any]:
    return {"name": name, "schema": demo_schema(), "rule": "dense", "seed": DEMO_CODEC_SEED}


def write_import_csv(path: Path, records: list[tuple[str, dict[str, Any]]]) -> None:
    with path.open("w", encoding="utf-8", newline="") as out:
        writer = csv.writer(out)
        writer.writerow(["key", *FIELDS])
        for key, fields in records:
            writer.writerow([key, *("" if fields[f] is None else fields[f] for f in FIELDS)])


def fragments_csv(records: list[tuple[str, dict[str, Any]]], n: int) -> tuple[str, list[str]]:
    """``n`` smudged labels; refs carry commas and quotes so the result's quoting is tested."""
    rng = random.Random(11)
    buffer = io.StringIO()
    writer = csv.writer(buffer)
    writer.writerow(["ref", *FIELDS])
    refs = []
    for i in range(n):
        key, fields = records[rng.randrange(len(records))]
        present = sum(v is not None for v in fields.values())
        cue = smudge(fields, rng, keep=min(3, present))
        ref = f'{key}, label "{i}"'
        refs.append(ref)
        writer.writerow([ref, *("" if cue.get(f) is None else cue[f] for f in FIELDS)])
    return buffer.getvalue(), refs


@pytest.fixture
def server(start_server: Callable[[], LiveServer]) -> LiveServer:
    return start_server()


@pytest.fixture
def key(server: LiveServer) -> str:
    return make_key(server)


@pytest.fixture
def client(server: LiveServer, key: str) -> Iterator[cb.Client]:
    with cb.Client(server.url, key) as c:
        yield c


@pytest.fixture
def seeded(client: cb.Client) -> cb.Client:
    """A 'specimens' collection with 400 demo specimens."""
    client.create_collection(collection_spec("specimens"))
    lines = [json.dumps({"key": k, "fields": f}) for k, f in demo_records(n=400)]
    client.import_memories("specimens", "\n".join(lines), format="ndjson")
    return client


# ---------------------------------------------------------------------- client


class TestClientErrors:
    def test_missing_collection_is_not_found_with_the_problem_members(
        self, client: cb.Client
    ) -> None:
        with pytest.raises(cb.NotFound) as caught:
            client.get_collection("no-such")
        err = caught.value
        assert (err.status, err.type) == (404, "/problems/collection-not-found")
        assert "no-such" in err.detail
        assert err.extra["collection"] == "no-such"

    def test_every_documented_error_the_server_gives_is_typed(self, seeded: cb.Client) -> None:
        job = seeded.submit_reconciliation("specimens", "ref,site_code\nA,SMP-C3\n")
        seeded.wait_reconciliation(job["id"], poll=0.1, timeout=120)
        cases: list[tuple[Callable[[], object], type[cb.CuebankError], str]] = [
            (lambda: seeded.get_memory("specimens", "SMP-0"), cb.NotFound, "memory-not-found"),
            (lambda: seeded.get_reconciliation("nope"), cb.NotFound, "job-not-found"),
            (
                lambda: seeded.create_collection(collection_spec("specimens")),
                cb.Conflict,
                "collection-exists",
            ),
            (lambda: seeded.cancel_reconciliation(job["id"]), cb.Conflict, "job-finished"),
            (
                lambda: seeded.recall("specimens", {"depth_m": 9000}),
                cb.InvalidInput,
                "invalid-cue",
            ),
            (
                lambda: seeded.submit_reconciliation("specimens", "ref,depth\nA,3\n"),
                cb.InvalidInput,
                "fragments-rejected",
            ),
            (
                lambda: seeded.list_memories("specimens", limit=100_000),
                cb.LimitExceeded,
                "limit-exceeded",
            ),
            (
                lambda: seeded.create_collection({"name": "x", "schema": {"fields": []}}),
                cb.InvalidInput,
                "invalid-request",
            ),
        ]
        for call, kind, slug in cases:
            with pytest.raises(kind) as caught:
                call()
            assert caught.value.slug == slug
            assert caught.value.status >= 400
            assert caught.value.detail

    def test_a_call_without_a_valid_key_is_unauthorized(self, server: LiveServer) -> None:
        with cb.Client(server.url, "cbk_not_a_key") as anonymous, pytest.raises(cb.Unauthorized):
            anonymous.list_collections()

    def test_a_read_key_writing_is_forbidden(self, server: LiveServer) -> None:
        with cb.Client(server.url, make_key(server, ("read",))) as reader:
            with pytest.raises(cb.Forbidden) as caught:
                reader.create_collection(collection_spec("specimens"))
        assert caught.value.status == 403

    def test_keys_are_made_listed_and_revoked_through_the_client(self, client: cb.Client) -> None:
        made = client.create_key(["read"], label="field laptop")
        assert made["secret"]
        assert made["prefix"] in {k["prefix"] for k in client.list_keys()}
        client.revoke_key(made["prefix"])
        with cb.Client(client.url, made["secret"]) as revoked, pytest.raises(cb.Unauthorized):
            revoked.list_collections()
        assert client.audit(limit=10)["items"]

    def test_no_server_is_a_connection_failure(self) -> None:
        with cb.Client("http://127.0.0.1:9", "k", timeout=2) as nowhere:
            with pytest.raises(cb.ConnectionFailed):
                nowhere.health()


class TestAsyncClient:
    @pytest.mark.anyio
    async def test_pages_recall_and_errors_work_awaited(self, seeded: cb.Client, key: str) -> None:
        async with cb.AsyncClient(seeded.url, key) as client:
            assert (await client.health())["status"] == "ok"
            keys = [m["key"] async for m in client.iter_memories("specimens", page_size=150)]
            assert keys == sorted(k for k, _ in demo_records(n=400))
            key0, fields = demo_records(n=400)[0]
            answer = await client.recall("specimens", fields)
            assert answer["best_key"] == key0
            with pytest.raises(cb.NotFound):
                await client.get_collection("nope")


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


# ---------------------------------------------------------------------- jobs


def wait_progress(client: cb.Client, job_id: str, timeout: float = 180) -> list[dict[str, Any]]:
    seen = []
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = client.get_reconciliation(job_id)
        seen.append(job)
        if job["state"] in ("done", "failed", "cancelled"):
            return seen
        time.sleep(0.1)
    raise AssertionError(f"job {job_id} did not finish: {seen[-1]}")


@pytest.mark.slow
class TestReconciliationJobs:
    def test_a_file_of_thousands_of_fragments_is_answered_in_input_order(
        self, seeded: cb.Client
    ) -> None:
        text, refs = fragments_csv(demo_records(n=400), N_ROWS)
        job = seeded.submit_reconciliation("specimens", text)
        assert job["rows_total"] == N_ROWS
        readings = wait_progress(seeded, job["id"])
        done = [r["rows_done"] for r in readings]
        assert done == sorted(done)  # progress never goes back
        final = readings[-1]
        assert (final["state"], final["rows_done"], final["error"]) == ("done", N_ROWS, None)
        assert sum(final["counts"].values()) == N_ROWS
        assert 0 < len(final["review"]) <= 20
        margins = [r["cue_margin"] for r in final["review"]]
        assert margins == sorted(margins)

        rows = list(csv.DictReader(io.StringIO(seeded.reconciliation_result(job["id"]))))
        assert [int(r["row"]) for r in rows] == list(range(1, N_ROWS + 1))
        assert [r["ref"] for r in rows] == refs  # commas and quotes survive the round trip
        assert list(rows[0])[:8] == [
            "row", "ref", "matched_key", "verdict", "reason", "overlap", "margin", "cue_margin"
        ]  # fmt: skip
        assert {f"{f}_score" for f in FIELDS} <= set(rows[0])
        # The job answers exactly as the batch endpoint does for the same cues.
        cues = [
            {f: (float(c[f]) if f == "depth_m" else c[f]) for f in FIELDS if c[f]}
            for c in csv.DictReader(io.StringIO(text))
        ][:200]
        direct = seeded.recall_batch("specimens", cues)["results"]
        assert [r["verdict"] for r in rows[:200]] == [d["verdict"] for d in direct]
        assert [r["matched_key"] or None for r in rows[:200]] == [
            (d["memory"] or {}).get("key") for d in direct
        ]
        assert any(r["verdict"] == "recalled" for r in rows)

        lines = seeded.reconciliation_result(job["id"], format="ndjson").splitlines()
        parsed = [json.loads(line) for line in lines]
        assert [p["ref"] for p in parsed] == refs
        assert [p["verdict"] for p in parsed] == [r["verdict"] for r in rows]

    def test_a_server_restart_mid_job_resumes_the_job(
        self, server: LiveServer, seeded: cb.Client
    ) -> None:
        text, _ = fragments_csv(demo_records(n=400), N_ROWS)
        job = seeded.submit_reconciliation("specimens", text)
        deadline = time.monotonic() + 120
        while seeded.get_reconciliation(job["id"])["rows_done"] == 0:
            assert time.monotonic() < deadline
            time.sleep(0.05)
        server.restart()
        final = wait_progress(seeded, job["id"])[-1]
        assert (final["state"], final["rows_done"]) == ("done", N_ROWS)
        rows = seeded.reconciliation_result(job["id"], format="ndjson").splitlines()
        assert [json.loads(r)["row"] for r in rows] == list(range(1, N_ROWS + 1))

    def test_a_cancelled_job_stops_and_keeps_its_answered_rows(self, seeded: cb.Client) -> None:
        text, _ = fragments_csv(demo_records(n=400), N_ROWS)
        job = seeded.submit_reconciliation("specimens", text)
        cancelled = seeded.cancel_reconciliation(job["id"])
        assert cancelled["state"] == "cancelled"
        time.sleep(0.5)
        after = seeded.get_reconciliation(job["id"])
        assert after["state"] == "cancelled"
        assert after["rows_done"] < N_ROWS
        rows = seeded.reconciliation_result(job["id"], format="ndjson").splitlines()
        assert len(rows) == after["rows_done"]


class TestAbandonedJobs:
    def test_a_job_left_running_by_a_dead_process_is_requeued(
        self, server: LiveServer, seeded: cb.Client
    ) -> None:
        from service.recall.jobs import ReconciliationService
        from service.recall.service import RecallService
        from service.storage.db import unit_of_work
        from service.storage.models import ReconciliationJob

        server.stop()
        settings = Settings(data_dir=server.data_dir)
        engine = make_engine(settings.resolved_database_url)
        try:
            jobs = ReconciliationService(RecallService(settings, make_session_factory(engine)))
            info = jobs.submit(TEAM, "specimens", b"ref,site_code\nA,SMP-C3\nB,SMP-M1\n", "csv")
            host = socket.gethostname()[:80]
            with unit_of_work(jobs.sessions, write=True) as session:
                row = session.get(ReconciliationJob, info.id)
                assert row is not None
                # A process id above any pid_max: no such process can be alive.
                row.state, row.owner, row.attempts = "running", f"{host}:2147483600:abc", 1
        finally:
            engine.dispose()
        server.start()
        final = wait_progress(seeded, info.id, timeout=60)[-1]
        assert (final["state"], final["rows_done"], final["attempts"]) == ("done", 2, 2)


# ---------------------------------------------------------------------- CLI


class TestCommandHelp:
    @pytest.mark.parametrize(
        "command",
        [
            ["collection"],
            ["collection", "create"],
            ["collection", "list"],
            ["collection", "show"],
            ["collection", "delete"],
            ["import"],
            ["recall"],
            ["capacity"],
            ["export"],
            ["reconcile"],
        ],
    )
    def test_help_describes_every_option(
        self, command: list[str], capsys: pytest.CaptureFixture[str]
    ) -> None:
        from service.cli import main

        with pytest.raises(SystemExit) as stop:
            main([*command, "--help"])
        assert stop.value.code == 0
        out = capsys.readouterr().out
        assert "--url" in out
        assert "--key" in out
        assert "-h, --help" in out

    @pytest.mark.parametrize(
        "argv",
        [
            ["import", "x.csv"],
            ["recall"],
            ["export", "--collection", "a", "--format", "xml"],
            ["collection", "rename"],
            ["import", "x.csv", "-c", "a", "--batch-size", "0"],
        ],
    )
    def test_wrong_usage_exits_2_with_a_one_line_hint(
        self, argv: list[str], capsys: pytest.CaptureFixture[str]
    ) -> None:
        from service.cli import main

        with pytest.raises(SystemExit) as stop:
            main(argv)
        assert stop.value.code == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1
        assert "--help" in err[0]


@pytest.mark.slow
class TestCommands:
    def test_an_interrupted_import_resumes_to_exactly_the_file(
        self, server: LiveServer, key: str, client: cb.Client, tmp_path: Path
    ) -> None:
        records = demo_records(n=N_ROWS)
        source = tmp_path / "specimens.csv"
        write_import_csv(source, records)
        spec = tmp_path / "specimens.json"
        spec.write_text(json.dumps(collection_spec("specimens")), encoding="utf-8")
        made = cli(server, key, "collection", "create", "--file", str(spec))
        assert made.returncode == 0, made.stderr

        first = cli(server, key, "import", str(source), "-c", "specimens", "--max-batches", "2")
        assert first.returncode == 4, first.stderr
        assert "rows/s" in first.stderr
        assert "ETA" in first.stderr
        assert client.get_collection("specimens")["n_memories"] == 1000

        again = cli(server, key, "import", str(source), "-c", "specimens", "--resume")
        assert again.returncode == 0, again.stderr
        assert "1000 rows already stored" in again.stderr
        stored = {m["key"]: m["fields"] for m in client.iter_memories("specimens")}
        assert sorted(stored) == sorted(k for k, _ in records)
        assert client.get_collection("specimens")["n_memories"] == N_ROWS

        exported = cli(server, key, "export", "-c", "specimens", "--format", "ndjson")
        lines = [json.loads(line) for line in exported.stdout.splitlines()]
        assert {line["key"] for line in lines} == set(stored)

    def test_recall_reconcile_capacity_and_local_reconcile(
        self, server: LiveServer, key: str, seeded: cb.Client, tmp_path: Path
    ) -> None:
        records = demo_records(n=400)
        k, fields = next((k, f) for k, f in records if f["depth_m"] is not None)
        shown = cli(
            server, key, "recall", "-c", "specimens",
            "--field", f"taxon={fields['taxon']}",
            "--field", f"site_code={fields['site_code']}",
            "--field", f"collected_on={fields['collected_on']}",
            "--field", f"depth_m={fields['depth_m']}",
        )  # fmt: skip
        assert shown.returncode == 0, shown.stderr
        assert shown.stdout.startswith("verdict ")
        assert k in shown.stdout

        piped = subprocess.run(
            [sys.executable, "-c", "import sys; from service.cli import main; sys.exit(main())",
             "recall", "-c", "specimens", "--json"],
            input=json.dumps({"taxon": fields["taxon"], "collector": fields["collector"]}),
            capture_output=True, text=True, timeout=120,
            env={**os.environ, "CUEBANK_URL": server.url, "CUEBANK_KEY": key,
                 "PYTHONPATH": str(ROOT)},
        )  # fmt: skip
        assert piped.returncode == 0, piped.stderr
        assert json.loads(piped.stdout)["verdict"] in ("recalled", "spurious", "unsettled")

        text, refs = fragments_csv(records, 300)
        labels = tmp_path / "labels.csv"
        labels.write_text(text, encoding="utf-8")
        out = tmp_path / "verdicts.csv"
        ran = cli(server, key, "reconcile", str(labels), "-c", "specimens", "-o", str(out))
        assert ran.returncode == 0, ran.stderr
        with out.open(encoding="utf-8", newline="") as result:
            served = list(csv.DictReader(result))
        assert [r["ref"] for r in served] == refs

        export = tmp_path / "specimens.csv"
        assert cli(server, key, "export", "-c", "specimens", "-o", str(export)).returncode == 0
        schema = tmp_path / "specimens.json"
        schema.write_text(json.dumps(collection_spec("specimens")), encoding="utf-8")
        local_out = tmp_path / "local.ndjson"
        local = cli(
            server, key, "reconcile", str(labels), "-c", "specimens", "--local", str(export),
            "--schema", str(schema), "--result-format", "ndjson", "-o", str(local_out),
        )  # fmt: skip
        assert local.returncode == 0, local.stderr
        answers = [json.loads(line) for line in local_out.read_text().splitlines()]
        assert [a["ref"] for a in answers] == refs
        # Same memories, same codec seed, same rule: the same verdicts as the server's.
        assert [a["verdict"] for a in answers] == [r["verdict"] for r in served]

        capacity = cli(server, key, "capacity", "-c", "specimens")
        assert capacity.returncode == 0, capacity.stderr
        assert "recommended rule" in capacity.stdout

    def test_server_errors_exit_with_the_documented_codes(
        self, server: LiveServer, key: str
    ) -> None:
        missing = cli(server, key, "capacity", "-c", "nope")
        assert missing.returncode == 2
        assert "collection-not-found" in missing.stderr
        down = subprocess.run(
            [sys.executable, "-c", "import sys; from service.cli import main; sys.exit(main())",
             "collection", "list", "--url", "http://127.0.0.1:9", "--key", key],
            capture_output=True, text=True, timeout=60, env={**os.environ, "PYTHONPATH": str(ROOT)},
        )  # fmt: skip
        assert down.returncode == 3
        assert len(down.stderr.strip().splitlines()) == 1


def test_error_types_follow_the_status_family() -> None:
    def answer(status: int, slug: str) -> httpx.Response:
        return httpx.Response(
            status,
            json={"type": f"/problems/{slug}", "title": "t", "status": status, "detail": "d"},
        )

    expected = {
        400: cb.InvalidInput, 401: cb.Unauthorized, 403: cb.Forbidden, 404: cb.NotFound,
        409: cb.Conflict, 413: cb.LimitExceeded, 415: cb.InvalidInput, 422: cb.InvalidInput,
        429: cb.RateLimited, 500: cb.ServerError, 502: cb.ServerError, 503: cb.Unavailable,
    }  # fmt: skip
    for status, kind in expected.items():
        err = cb.error_from_response(answer(status, "x"))
        assert type(err) is kind, status
        assert (err.status, err.detail) == (status, "d")
    assert isinstance(cb.error_from_response(answer(422, "limit-exceeded")), cb.LimitExceeded)
    limited = cb.error_from_response(
        httpx.Response(429, headers={"Retry-After": "3"}, text="slow down")
    )
    assert isinstance(limited, cb.RateLimited)
    assert limited.retry_after == 3.0
