"""Reconciliation: recall every fragment of a file, as a background job with progress.

A team uploads a CSV or NDJSON file of fragments (each row: an optional ``ref`` or ``row_id``
and any subset of the collection's fields). The job lives in the database; a :class:`JobRunner`
thread per app claims queued jobs and answers them in batches through
:meth:`RecallService.recall`. Each batch's answers are committed together with the new
``rows_done``, so progress is real and a job interrupted anywhere resumes from its last batch.

A job left ``running`` by a runner that is gone (its process exited, or it stopped answering
for :data:`STALE_SECONDS`) is put back in the queue and resumed; after :data:`MAX_ATTEMPTS`
interruptions it is failed with the reason, so no job stays ``running`` for ever.

>>> data = b"ref,depth_m\\nL-1,3.5\\nL-2,\\n"
>>> [f.cue for f in parse_fragments(data, "csv", {"depth_m": "number"})]
[{'depth_m': 3.5}, {}]
"""

from __future__ import annotations

import csv
import io
import json
import logging
import math
import os
import secrets
import socket
import threading
import time
import uuid
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any, Final

from sqlalchemy import select, update

from service.storage.db import unit_of_work
from service.storage.models import (
    Collection,
    ReconciliationJob,
    ReconciliationRow,
    Team,
)

from .errors import (
    CollectionNotFound,
    CueInvalid,
    FragmentsRejected,
    JobFinished,
    JobNotFound,
    LimitExceeded,
    ServiceError,
)
from .models import Fields, RecallOptions, RecallResult
from .service import RecallService

__all__ = [
    "FORMATS",
    "JOB_BATCH",
    "MAX_ATTEMPTS",
    "REVIEW_ROWS",
    "STALE_SECONDS",
    "Fragment",
    "JobInfo",
    "JobRunner",
    "ReconciliationService",
    "answer_fragments",
    "parse_fragments",
    "result_columns",
    "result_record",
    "write_results",
]

logger = logging.getLogger("cuebank.jobs")

FORMATS: Final = ("csv", "ndjson")
#: Rows answered per batch and per commit: large enough for one matrix product to pay off,
#: small enough that progress moves every second or so on a busy machine.
JOB_BATCH: Final = 256
#: A running job whose runner has not committed for this long is taken as abandoned. It must
#: outlast the longest compile a batch may trigger, which is why it is minutes, not seconds.
STALE_SECONDS: Final = 300.0
#: Interruptions after which a job is failed instead of resumed once more (a file that kills
#: its process every time must not loop for ever).
MAX_ATTEMPTS: Final = 5
#: How many rows the job summary offers for a human look.
REVIEW_ROWS: Final = 20
REF_COLUMNS: Final = ("ref", "row_id")
STATES: Final = ("queued", "running", "done", "failed", "cancelled")
FINISHED: Final = ("done", "failed", "cancelled")
INVALID: Final = "invalid"
FIXED_COLUMNS: Final = (
    "row",
    "ref",
    "matched_key",
    "verdict",
    "reason",
    "overlap",
    "margin",
    "cue_margin",
)


def _now() -> datetime:
    return datetime.now(UTC)


# ---------------------------------------------------------------------- parsing


@dataclass(frozen=True)
class Fragment:
    """One input row: its 1-based position, the caller's reference and the known fields.

    ``problem`` is set instead of a usable cue when the row cannot be read; such a row is
    answered with the verdict ``invalid`` and the problem as its reason.
    """

    row: int
    ref: str | None
    cue: Fields
    problem: str | None = None


def _reject(detail: str) -> FragmentsRejected:
    return FragmentsRejected(detail + "; the job was not created")


def _cell(kind: str, name: str, text: str) -> tuple[Any, str | None]:
    value = text.strip()
    if not value:
        return None, None
    if kind == "number":
        try:
            number = float(value)
        except ValueError:
            return None, f"field {name!r}: {value!r} is not a number"
        if not math.isfinite(number):
            return None, f"field {name!r}: {value!r} is not a finite number"
        return number, None
    return (text if kind in ("text", "category") else value), None


def _parse_csv(text: str, kinds: Mapping[str, str]) -> list[Fragment]:
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = [name.strip() for name in next(reader)]
    except StopIteration:
        raise _reject("the CSV is empty; it needs a header row") from None
    except csv.Error as exc:
        raise _reject(f"the CSV header cannot be read: {exc}") from None
    allowed = [*REF_COLUMNS, *kinds]
    for name in header:
        if header.count(name) > 1:
            raise _reject(f"the CSV header names column {name!r} twice")
        if name not in allowed:
            raise _reject(
                f"the CSV header has a column {name!r} that is no field of the collection "
                f"(allowed columns: {', '.join(allowed)})"
            )
    if not any(name in kinds for name in header):
        raise _reject(f"the CSV header names no field of the collection ({', '.join(kinds)})")
    out: list[Fragment] = []
    number = 0
    try:
        for cells in reader:
            if not any(cell.strip() for cell in cells):
                continue
            number += 1
            out.append(_csv_fragment(number, header, cells, kinds))
    except csv.Error as exc:
        raise _reject(f"the CSV cannot be read at line {reader.line_num}: {exc}") from None
    return out


def _csv_fragment(
    number: int, header: list[str], cells: list[str], kinds: Mapping[str, str]
) -> Fragment:
    ref: str | None = None
    for name, cell in zip(header, cells, strict=False):
        if name in REF_COLUMNS and cell.strip():
            ref = cell.strip()
    if len(cells) != len(header):
        return Fragment(
            number, ref, {}, f"the row has {len(cells)} cells, the header has {len(header)}"
        )
    cue: Fields = {}
    for name, cell in zip(header, cells, strict=True):
        if name in REF_COLUMNS:
            continue
        value, problem = _cell(kinds[name], name, cell)
        if problem is not None:
            return Fragment(number, ref, {}, problem)
        if value is not None:
            cue[name] = value
    return Fragment(number, ref, cue)


def _parse_ndjson(text: str, kinds: Mapping[str, str]) -> list[Fragment]:
    out: list[Fragment] = []
    for line in text.splitlines():
        if not line.strip():
            continue
        number = len(out) + 1
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            out.append(Fragment(number, None, {}, f"not valid JSON: {exc.msg}"))
            continue
        if not isinstance(obj, dict):
            out.append(Fragment(number, None, {}, "a line must be a JSON object"))
            continue
        raw_ref = next((obj[k] for k in REF_COLUMNS if obj.get(k) not in (None, "")), None)
        ref = None if raw_ref is None else str(raw_ref)
        unknown = sorted(set(obj) - set(kinds) - set(REF_COLUMNS))
        if unknown:
            out.append(Fragment(number, ref, {}, f"{unknown[0]!r} is no field of the collection"))
            continue
        cue: Fields = {}
        problem = None
        for name, value in obj.items():
            if name in REF_COLUMNS or value is None or value == "":
                continue
            if isinstance(value, bool) or not isinstance(value, str | int | float):
                problem = f"field {name!r} must be a string or a number"
                break
            if isinstance(value, str) and not value.strip():
                continue
            cue[name] = value
        out.append(Fragment(number, ref, {} if problem else cue, problem))
    return out


def parse_fragments(data: bytes, fmt: str, kinds: Mapping[str, str]) -> list[Fragment]:
    """The fragments of a CSV or NDJSON file, in file order.

    ``kinds`` maps the collection's field names to their kinds. Problems of the whole file
    (not UTF-8, a header naming an unknown column) raise :class:`FragmentsRejected`; a bad row
    becomes a fragment with a ``problem``.
    """
    if fmt not in FORMATS:
        raise _reject(f"format must be one of {', '.join(FORMATS)}, got {fmt!r}")
    try:
        text = data.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as exc:
        raise _reject(f"the file is not UTF-8: byte at offset {exc.start}") from None
    return _parse_csv(text, kinds) if fmt == "csv" else _parse_ndjson(text, kinds)


# ---------------------------------------------------------------------- answering


def result_record(
    fragment: Fragment, result: RecallResult | None, problem: str | None
) -> dict[str, Any]:
    """What is stored (and returned) for one answered fragment."""
    if result is None:
        return {
            "ref": fragment.ref,
            "matched_key": None,
            "best_key": None,
            "verdict": INVALID,
            "reason": problem or fragment.problem or "the row cannot be used as a cue",
            "overlap": None,
            "margin": None,
            "cue_margin": None,
            "fields": {},
        }
    return {
        "ref": fragment.ref,
        "matched_key": result.memory.key if result.memory is not None else None,
        "best_key": result.best_key,
        "verdict": result.verdict,
        "reason": result.reason,
        "overlap": result.overlap,
        "margin": result.margin,
        "cue_margin": result.cue_margin,
        "fields": {name: [f.value, f.score] for name, f in result.fields.items()},
    }


def answer_fragments(
    service: RecallService, team: str, name: str, fragments: Sequence[Fragment]
) -> list[dict[str, Any]]:
    """Recall a batch of fragments; one record per fragment, in order.

    A row the schema refuses (a value out of range, a text too long) is answered ``invalid``
    with the reason, and the rest of the batch is recalled without it. Errors of the
    collection as a whole (gone, empty, rule cannot store its memories) propagate.
    """
    answers: list[dict[str, Any] | None] = [None] * len(fragments)
    pending: list[int] = []
    limit = service.settings.max_text_length
    for i, frag in enumerate(fragments):
        if frag.problem is not None:
            answers[i] = result_record(frag, None, None)
        elif not frag.cue:
            answers[i] = result_record(frag, None, "the row gives no field value")
        elif any(isinstance(v, str) and len(v) > limit for v in frag.cue.values()):
            answers[i] = result_record(frag, None, f"a value is longer than {limit} characters")
        else:
            pending.append(i)
    while pending:
        try:
            results = service.recall(
                team, name, [dict(fragments[i].cue) for i in pending], RecallOptions()
            )
        except CueInvalid as exc:
            at = exc.extra.get("cue")
            bad = pending[at] if isinstance(at, int) and 0 <= at < len(pending) else None
            if bad is None:
                raise
            answers[bad] = result_record(fragments[bad], None, exc.detail)
            pending.remove(bad)
            continue
        except LimitExceeded as exc:
            # Without a cue position the batch cannot be split; answer each row alone.
            if len(pending) == 1:
                answers[pending[0]] = result_record(fragments[pending[0]], None, exc.detail)
                break
            for i in pending:
                answers[i] = answer_fragments(service, team, name, [fragments[i]])[0]
            break
        for i, result in zip(pending, results, strict=True):
            answers[i] = result_record(fragments[i], result, None)
        break
    return [a for a in answers if a is not None]


def result_columns(field_names: Sequence[str]) -> list[str]:
    """The columns of a result file: the fixed ones, then ``<field>`` and ``<field>_score``.

    >>> result_columns(["taxon"])[-3:]
    ['cue_margin', 'taxon', 'taxon_score']
    """
    out = list(FIXED_COLUMNS)
    for name in field_names:
        out += [name, f"{name}_score"]
    return out


def _flat(row: int, data: Mapping[str, Any], field_names: Sequence[str]) -> dict[str, Any]:
    flat: dict[str, Any] = {"row": row}
    for column in FIXED_COLUMNS[1:]:
        flat[column] = data.get(column)
    decoded = data.get("fields") or {}
    for name in field_names:
        value, score = decoded.get(name, [None, None])
        flat[name] = value
        flat[f"{name}_score"] = score
    return flat


def write_results(
    rows: Iterator[tuple[int, dict[str, Any]]], field_names: Sequence[str], fmt: str
) -> Iterator[str]:
    """Result rows as CSV (with a header) or NDJSON text, a chunk at a time."""
    columns = result_columns(field_names)
    if fmt == "ndjson":
        for row, data in rows:
            yield json.dumps(_flat(row, data, field_names), ensure_ascii=False) + "\n"
        return
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\r\n")
    writer.writeheader()
    for row, data in rows:
        flat = _flat(row, data, field_names)
        writer.writerow({k: "" if v is None else v for k, v in flat.items()})
        if buffer.tell() > 64 * 1024:
            yield buffer.getvalue()
            buffer.seek(0)
            buffer.truncate()
    yield buffer.getvalue()


# ---------------------------------------------------------------------- jobs


def _empty_counts() -> dict[str, Any]:
    return {"recalled": 0, "spurious": 0, "unsettled": 0, INVALID: 0, "reasons": {}}


def _add_counts(counts: dict[str, Any], records: Sequence[dict[str, Any]]) -> dict[str, Any]:
    out = {**counts, "reasons": {k: dict(v) for k, v in counts.get("reasons", {}).items()}}
    for record in records:
        verdict = str(record["verdict"])
        out[verdict] = int(out.get(verdict, 0)) + 1
        if verdict in ("spurious", "unsettled"):
            by_reason = out["reasons"].setdefault(verdict, {})
            reason = str(record["reason"])
            by_reason[reason] = int(by_reason.get(reason, 0)) + 1
    return out


@dataclass(frozen=True)
class JobInfo:
    id: str
    collection: str
    state: str
    format: str
    rows_total: int
    rows_done: int
    rate: float | None
    eta_seconds: float | None
    counts: dict[str, Any]
    error: str | None
    attempts: int
    created_at: datetime
    updated_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
    field_names: list[str]
    review: list[dict[str, Any]] = field(default_factory=list)


def _owner_token() -> str:
    return f"{socket.gethostname()[:80]}:{os.getpid()}:{secrets.token_hex(6)}"


#: Tokens of the runners alive in this process; a job owned by this process under a token not
#: here belongs to a runner that stopped without handing its job back.
_LIVE_TOKENS: set[str] = set()
_LIVE_LOCK = threading.Lock()


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _owner_gone(owner: str | None, updated_at: datetime, stale: float) -> bool:
    if owner is None:
        return True
    if (_now() - updated_at).total_seconds() > stale:
        return True
    host, _, rest = owner.partition(":")
    pid_text, _, _token = rest.partition(":")
    if host != socket.gethostname()[:80] or not pid_text.isdigit():
        return False  # another machine: only its silence (staleness) tells
    if int(pid_text) == os.getpid():
        with _LIVE_LOCK:
            return owner not in _LIVE_TOKENS
    return not _pid_alive(int(pid_text))


class _Lost(Exception):
    """The job changed under the runner (cancelled, or reclaimed): drop the batch."""


class ReconciliationService:
    """Reconciliation jobs of one running service: submit, read, cancel, and run."""

    def __init__(self, service: RecallService) -> None:
        self.service = service
        self.sessions = service.sessions

    # ------------------------------------------------------------------ requests

    def _kinds(self, coll: Collection) -> dict[str, str]:
        return {str(f["name"]): str(f["kind"]) for f in coll.schema["fields"]}

    def submit(self, team: str, name: str, data: bytes, fmt: str) -> JobInfo:
        """Queue a job over ``data``; the file is checked and counted now."""
        with unit_of_work(self.sessions, write=True) as session:
            coll = self.service._collection(session, team, name)
            fragments = parse_fragments(data, fmt, self._kinds(coll))
            now = _now()
            job = ReconciliationJob(
                id=str(uuid.uuid4()),
                team_id=coll.team_id,
                collection_id=coll.id,
                state="done" if not fragments else "queued",
                format=fmt,
                input=data,
                rows_total=len(fragments),
                rows_done=0,
                counts=_empty_counts(),
                created_at=now,
                updated_at=now,
                finished_at=now if not fragments else None,
            )
            session.add(job)
            session.flush()
            return self._info(session, job, coll)

    def _job(self, session: Any, team: str, job_id: str) -> tuple[ReconciliationJob, Collection]:
        try:
            team_id = self.service._team_id(session, team)
        except CollectionNotFound:
            team_id = None
        job = session.get(ReconciliationJob, job_id) if len(job_id) <= 36 else None
        # Another team's job answers exactly like a missing one.
        if job is None or job.team_id != team_id:
            raise JobNotFound(f"reconciliation job {job_id!r} does not exist", job=job_id)
        coll = session.get(Collection, job.collection_id)
        assert coll is not None  # the foreign key cascades deletes to the job
        return job, coll

    def _review(self, session: Any, job_id: str) -> list[dict[str, Any]]:
        stmt = (
            select(ReconciliationRow.row, ReconciliationRow.data)
            .where(
                ReconciliationRow.job_id == job_id,
                ReconciliationRow.cue_margin.is_not(None),
            )
            .order_by(ReconciliationRow.cue_margin, ReconciliationRow.row)
            .limit(REVIEW_ROWS)
        )
        return [
            {
                "row": row,
                "ref": data.get("ref"),
                "verdict": data.get("verdict"),
                "reason": data.get("reason"),
                "best_key": data.get("best_key"),
                "cue_margin": data.get("cue_margin"),
                "margin": data.get("margin"),
            }
            for row, data in session.execute(stmt)
        ]

    def _info(self, session: Any, job: ReconciliationJob, coll: Collection) -> JobInfo:
        rate = eta = None
        if job.started_at is not None and job.rows_done:
            end = job.finished_at or job.updated_at
            elapsed = (end - job.started_at).total_seconds()
            if elapsed > 0:
                rate = round(job.rows_done / elapsed, 3)
                if job.state in ("queued", "running"):
                    eta = round((job.rows_total - job.rows_done) / rate, 1)
        return JobInfo(
            id=job.id,
            collection=coll.name,
            state=job.state,
            format=job.format,
            rows_total=job.rows_total,
            rows_done=job.rows_done,
            rate=rate,
            eta_seconds=eta,
            counts=dict(job.counts),
            error=job.error,
            attempts=job.attempts,
            created_at=job.created_at,
            updated_at=job.updated_at,
            started_at=job.started_at,
            finished_at=job.finished_at,
            field_names=list(self._kinds(coll)),
            review=self._review(session, job.id),
        )

    def get(self, team: str, job_id: str) -> JobInfo:
        with unit_of_work(self.sessions, write=False) as session:
            job, coll = self._job(session, team, job_id)
            return self._info(session, job, coll)

    def cancel(self, team: str, job_id: str) -> JobInfo:
        """Stop a queued or running job; the rows answered so far stay readable."""
        with unit_of_work(self.sessions, write=True) as session:
            job, coll = self._job(session, team, job_id)
            if job.state in FINISHED:
                raise JobFinished(
                    f"reconciliation job {job_id!r} is {job.state} already", state=job.state
                )
            now = _now()
            job.state, job.owner, job.finished_at, job.updated_at = "cancelled", None, now, now
            session.flush()
            return self._info(session, job, coll)

    def results(self, team: str, job_id: str) -> tuple[JobInfo, Iterator[tuple[int, Any]]]:
        """The job, and an iterator over its answered rows in input order (read in pages)."""
        info = self.get(team, job_id)

        def rows() -> Iterator[tuple[int, Any]]:
            after = 0
            while True:
                with unit_of_work(self.sessions, write=False) as session:
                    stmt = (
                        select(ReconciliationRow.row, ReconciliationRow.data)
                        .where(ReconciliationRow.job_id == job_id, ReconciliationRow.row > after)
                        .order_by(ReconciliationRow.row)
                        .limit(1000)
                    )
                    page = [(int(r), dict(d)) for r, d in session.execute(stmt)]
                if not page:
                    return
                yield from page
                after = page[-1][0]

        return info, rows()

    # ------------------------------------------------------------------ running

    def requeue_abandoned(self, stale: float = STALE_SECONDS) -> int:
        """Put running jobs whose runner is gone back in the queue; return how many."""
        with unit_of_work(self.sessions, write=True) as session:
            stmt = select(ReconciliationJob).where(ReconciliationJob.state == "running")
            count = 0
            for job in session.scalars(stmt):
                if _owner_gone(job.owner, job.updated_at, stale):
                    logger.warning(
                        "job %s was left running by %s at row %d; resuming it",
                        job.id,
                        job.owner,
                        job.rows_done,
                    )
                    job.state, job.owner, job.updated_at = "queued", None, _now()
                    count += 1
            return count

    def claim(self, owner: str) -> str | None:
        """Take the oldest queued job for ``owner``; None when the queue is empty."""
        with unit_of_work(self.sessions, write=True) as session:
            stmt = (
                select(ReconciliationJob)
                .where(ReconciliationJob.state == "queued")
                .order_by(ReconciliationJob.created_at, ReconciliationJob.id)
                .limit(1)
            )
            job = session.scalars(stmt).first()
            if job is None:
                return None
            now = _now()
            if job.attempts >= MAX_ATTEMPTS:
                job.state, job.finished_at, job.updated_at = "failed", now, now
                job.error = (
                    f"interrupted {job.attempts} times (last at row {job.rows_done} of "
                    f"{job.rows_total}); not resumed again"
                )
                return None
            claimed = session.execute(
                update(ReconciliationJob)
                .where(ReconciliationJob.id == job.id, ReconciliationJob.state == "queued")
                .values(
                    state="running",
                    owner=owner,
                    attempts=ReconciliationJob.attempts + 1,
                    started_at=job.started_at or now,
                    updated_at=now,
                )
                .execution_options(synchronize_session=False)
            )
            return job.id if getattr(claimed, "rowcount", 0) == 1 else None

    def release(self, job_id: str, owner: str) -> None:
        """Hand a running job back to the queue (a clean shutdown mid-job)."""
        with unit_of_work(self.sessions, write=True) as session:
            session.execute(
                update(ReconciliationJob)
                .where(
                    ReconciliationJob.id == job_id,
                    ReconciliationJob.owner == owner,
                    ReconciliationJob.state == "running",
                )
                .values(state="queued", owner=None, attempts=ReconciliationJob.attempts - 1)
                .execution_options(synchronize_session=False)
            )

    def fail(self, job_id: str, owner: str, reason: str) -> None:
        with unit_of_work(self.sessions, write=True) as session:
            now = _now()
            session.execute(
                update(ReconciliationJob)
                .where(ReconciliationJob.id == job_id, ReconciliationJob.owner == owner)
                .values(state="failed", owner=None, error=reason, finished_at=now, updated_at=now)
                .execution_options(synchronize_session=False)
            )

    def load(self, job_id: str) -> tuple[str, str, list[Fragment]]:
        """Team name, collection name and the parsed fragments of a job."""
        with unit_of_work(self.sessions, write=False) as session:
            job = session.get(ReconciliationJob, job_id)
            if job is None:
                raise _Lost(job_id)
            coll = session.get(Collection, job.collection_id)
            team = session.get(Team, job.team_id)
            assert coll is not None
            assert team is not None
            return team.name, coll.name, parse_fragments(job.input, job.format, self._kinds(coll))

    def step(
        self, job_id: str, owner: str, team: str, name: str, fragments: Sequence[Fragment]
    ) -> bool:
        """Answer the next batch of a job this owner holds; False when nothing is left to do."""
        with unit_of_work(self.sessions, write=False) as session:
            job = session.get(ReconciliationJob, job_id)
            if job is None or job.state != "running" or job.owner != owner:
                return False
            done, counts = job.rows_done, dict(job.counts)
        size = min(JOB_BATCH, self.service.settings.max_batch)
        batch = fragments[done : done + size]
        records = answer_fragments(self.service, team, name, batch) if batch else []
        new_done = done + len(batch)
        finished = new_done >= len(fragments)
        now = _now()
        try:
            with unit_of_work(self.sessions, write=True) as session:
                values: dict[str, Any] = {
                    "rows_done": new_done,
                    "counts": _add_counts(counts, records),
                    "updated_at": now,
                }
                if finished:
                    values.update(state="done", owner=None, finished_at=now)
                moved = session.execute(
                    update(ReconciliationJob)
                    .where(
                        ReconciliationJob.id == job_id,
                        ReconciliationJob.owner == owner,
                        ReconciliationJob.state == "running",
                        ReconciliationJob.rows_done == done,
                    )
                    .values(**values)
                    .execution_options(synchronize_session=False)
                )
                if getattr(moved, "rowcount", 0) != 1:
                    raise _Lost(job_id)
                session.add_all(
                    ReconciliationRow(
                        job_id=job_id,
                        row=frag.row,
                        verdict=str(record["verdict"]),
                        cue_margin=record["cue_margin"],
                        data=record,
                    )
                    for frag, record in zip(batch, records, strict=True)
                )
        except _Lost:
            return False
        return not finished


class JobRunner:
    """The background thread that answers queued jobs; one per app, started in its lifespan."""

    def __init__(
        self, jobs: ReconciliationService, *, poll: float = 0.2, stale: float = STALE_SECONDS
    ) -> None:
        self.jobs = jobs
        self.poll = poll
        self.stale = stale
        self.owner = _owner_token()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        with _LIVE_LOCK:
            _LIVE_TOKENS.add(self.owner)
        self.jobs.requeue_abandoned(self.stale)
        self._thread = threading.Thread(target=self._loop, name="cuebank-jobs", daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 30.0) -> None:
        """Finish the current batch, hand the job back to the queue, and end the thread."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        with _LIVE_LOCK:
            _LIVE_TOKENS.discard(self.owner)

    def _loop(self) -> None:
        last_sweep = time.monotonic()
        while not self._stop.is_set():
            try:
                if time.monotonic() - last_sweep > min(self.stale, 30.0):
                    self.jobs.requeue_abandoned(self.stale)
                    last_sweep = time.monotonic()
                job_id = self.jobs.claim(self.owner)
            except Exception:
                logger.exception("the job queue cannot be read; trying again")
                self._stop.wait(max(self.poll, 1.0))
                continue
            if job_id is None:
                self._stop.wait(self.poll)
                continue
            self._run(job_id)

    def _run(self, job_id: str) -> None:
        try:
            team, name, fragments = self.jobs.load(job_id)
            while self.jobs.step(job_id, self.owner, team, name, fragments):
                if self._stop.is_set():
                    self.jobs.release(job_id, self.owner)
                    return
        except _Lost:
            return
        except ServiceError as exc:
            self.jobs.fail(job_id, self.owner, exc.detail)
        except Exception as exc:
            logger.exception("reconciliation job %s failed", job_id)
            self.jobs.fail(job_id, self.owner, f"the service met an unexpected error: {exc}")
