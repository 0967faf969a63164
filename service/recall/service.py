"""Use-cases: collections, memories, compile and recall, on top of storage and the engine.

Every method opens its own unit of work (commit on success, rollback on any exception), checks
the caller's input against the schema and the hard limits, maps engine and storage errors to
:mod:`service.recall.errors`, and returns the plain data of :mod:`service.recall.models`.

Read-your-writes: a recall reads the collection's revision in the database first and answers
from a compiled memory of exactly that revision, compiling (or updating incrementally) when the
cached one is older, so a write acknowledged by any worker is seen by the next recall anywhere.
"""

from __future__ import annotations

import math
import re
import secrets
import time
from collections.abc import Iterable, Sequence
from datetime import UTC, date, datetime
from typing import Any

import numpy as np

from service.engine import (
    DependentMemoryError,
    EngineError,
    ParameterError,
    RecordError,
    SchemaError,
    VerdictThresholds,
    calibrate,
    capacity_report,
    judge,
    make_rule,
    settle,
)
from service.engine.codec import Codec, Schema
from service.settings import Settings
from service.storage.db import SessionFactory, unit_of_work
from service.storage.errors import DuplicateNameError
from service.storage.models import Collection
from service.storage.repositories import (
    CollectionRepository,
    CompileReportRepository,
    MemoryRepository,
    RevisionReader,
    TeamRepository,
)

from .compiled import CompiledCache, CompiledMemory, FieldCandidates
from .errors import (
    CollectionExists,
    CollectionNotFound,
    CueInvalid,
    DependentMemories,
    EmptyCollection,
    ImportRejected,
    LimitExceeded,
    MemoryNotFound,
    OptionInvalid,
    RecordInvalid,
    SchemaInvalid,
    ServiceError,
)
from .models import (
    CapacityInfo,
    CollectionInfo,
    CollectionPatch,
    CollectionSpec,
    CompileInfo,
    DecodedField,
    Fields,
    FieldValue,
    ImportReport,
    MemoryInfo,
    MemoryPage,
    Neighbour,
    PutResult,
    RecalledMemory,
    RecallOptions,
    RecallResult,
    RowError,
)
from .paging import decode_cursor, encode_cursor, page_size

__all__ = ["DEFAULT_TEAM", "RecallService"]

DEFAULT_TEAM = "default"
NAME_RE = re.compile(r"^[a-z0-9][a-z0-9_-]{0,63}$")
_CONTROL_RE = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")
KEY_MAX = 256
#: Verdict options a collection may set; thresholds override calibration.
VERDICT_OPTIONS = (
    "calibrate",
    "recall_overlap",
    "min_agreement",
    "min_cue_margin",
    "min_field_agreement",
    "max_steps",
)
THRESHOLD_OPTIONS = ("recall_overlap", "min_agreement", "min_cue_margin", "min_field_agreement")
#: Fewer memories than this are not enough to calibrate thresholds; defaults are used.
MIN_CALIBRATION_MEMORIES = 8
#: The most cues settled in one pass; a larger batch goes through in runs of this size. Each
#: pass holds a few cues-by-memories and cues-by-units arrays; past a few hundred cues they
#: outgrow the core's cache and fresh pages, and the time per cue rose by half to double
#: (``cuebank bench``'s collection, N = 1024, P = 1,000: 40 µs a cue up to 256 cues, 62 µs at
#: 512), while a run of this size keeps the products as efficient as a whole batch's.
RUN_CUES = 128


def _now() -> datetime:
    return datetime.now(UTC)


def _check_name(name: str) -> str:
    if not isinstance(name, str) or not NAME_RE.match(name):
        raise OptionInvalid(
            f"collection name {name!r} must be 1 to 64 characters: lower-case letters, digits, "
            "'-' and '_', starting with a letter or digit",
            field="name",
        )
    return name


def check_key(key: str, *, field: str = "key") -> str:
    """Memory keys: 1 to 256 characters, no control characters."""
    if not isinstance(key, str) or not key:
        raise RecordInvalid(f"{field} must be a non-empty string", field=field)
    if len(key) > KEY_MAX:
        raise LimitExceeded(
            f"{field} is {len(key)} characters long, above the limit of {KEY_MAX}",
            limit="key_length",
            value=len(key),
            maximum=KEY_MAX,
        )
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in key):
        raise RecordInvalid(f"{field} {key[:40]!r} contains a control character", field=field)
    return key


def _json_value(value: Any) -> FieldValue:
    """A normalised codec value as stored and returned in JSON."""
    if isinstance(value, date):
        return value.isoformat()
    return value  # type: ignore[no-any-return]


def _rounded(values: np.ndarray, digits: int) -> list[float]:
    """``values`` as Python floats rounded to ``digits`` decimals (Python's correctly
    rounded ``round``, not numpy's scaled one)."""
    return [round(x, digits) for x in values.tolist()]


class RecallService:
    """The use-cases of one running service (one per worker process)."""

    def __init__(self, settings: Settings, sessions: SessionFactory) -> None:
        self.settings = settings
        self.sessions = sessions
        self.cache = CompiledCache(settings.cache_bytes)
        self._revisions = RevisionReader(sessions.kw["bind"])

    # ------------------------------------------------------------------ helpers

    def _team_id(self, session: Any, team: str) -> int:
        repo = TeamRepository(session)
        found = repo.get_by_name(team)
        if found is None:
            if team != DEFAULT_TEAM:
                raise CollectionNotFound(f"no collection here for team {team!r}")
            found = repo.get_or_create_default()
        return int(found.id)

    def _collection(self, session: Any, team: str, name: str) -> Collection:
        team_id = self._team_id(session, team)
        coll = CollectionRepository(session).get(team_id, name)
        if coll is None:
            raise CollectionNotFound(f"collection {name!r} does not exist", collection=name)
        return coll

    def _schema(self, coll: Collection) -> Schema:
        return Schema.from_dict(coll.schema)

    def _codec(self, coll: Collection) -> Codec:
        return Codec(self._schema(coll), int(coll.seed))

    def _info(self, session: Any, coll: Collection) -> CollectionInfo:
        schema = self._schema(coll)
        return CollectionInfo(
            name=coll.name,
            description=coll.description,
            schema=schema.to_dict(),
            rule=coll.rule,
            rule_options=dict(coll.rule_options),
            verdict_options=dict(coll.verdict_options),
            seed=int(coll.seed),
            revision=int(coll.revision),
            n_memories=MemoryRepository(session).count(coll.id),
            n_units=schema.n_units,
            created_at=coll.created_at,
            updated_at=coll.updated_at,
        )

    def _check_schema(self, raw: Any) -> Schema:
        if not isinstance(raw, dict):
            raise SchemaInvalid("schema must be an object with a 'fields' list", field="schema")
        fields = raw.get("fields")
        if isinstance(fields, list) and len(fields) > self.settings.max_fields:
            raise LimitExceeded(
                f"schema has {len(fields)} fields, above the limit of {self.settings.max_fields}",
                limit="max_fields",
                value=len(fields),
                maximum=self.settings.max_fields,
            )
        try:
            schema = Schema.from_dict(raw)
        except SchemaError as exc:
            raise SchemaInvalid(str(exc), field=exc.field) from None
        if schema.n_units > self.settings.max_units:
            raise LimitExceeded(
                f"schema has {schema.n_units} units in all, above the limit of "
                f"{self.settings.max_units}",
                limit="max_units",
                value=schema.n_units,
                maximum=self.settings.max_units,
            )
        for spec in schema.fields:
            limit = getattr(spec, "max_length", None)
            if limit is not None and limit > self.settings.max_text_length:
                raise LimitExceeded(
                    f"field {spec.name!r}: max_length {limit} is above the service's text "
                    f"length limit {self.settings.max_text_length}",
                    limit="max_text_length",
                    value=limit,
                    maximum=self.settings.max_text_length,
                )
        return schema

    def _check_rule(self, rule: str, options: dict[str, Any]) -> None:
        try:
            make_rule(rule, **options)
        except ParameterError as exc:
            raise OptionInvalid(str(exc), field="rule_options" if rule else "rule") from None

    def _check_verdict_options(self, options: dict[str, Any]) -> dict[str, Any]:
        if not isinstance(options, dict):
            raise OptionInvalid("verdict_options must be an object", field="verdict_options")
        unknown = sorted(set(options) - set(VERDICT_OPTIONS))
        if unknown:
            raise OptionInvalid(
                f"verdict_options has no option {', '.join(map(repr, unknown))}; "
                f"allowed: {', '.join(VERDICT_OPTIONS)}",
                field="verdict_options",
            )
        out = dict(options)
        if "calibrate" in out and not isinstance(out["calibrate"], bool):
            raise OptionInvalid(
                "verdict_options.calibrate must be true or false", field="verdict_options.calibrate"
            )
        for name in THRESHOLD_OPTIONS:
            value = out.get(name)
            if value is None:
                continue
            if (
                isinstance(value, bool)
                or not isinstance(value, int | float)
                or not math.isfinite(value)
                or not -1.0 <= value <= 2.0
            ):
                raise OptionInvalid(
                    f"verdict_options.{name} must be a number in [-1, 2], got {value!r}",
                    field=f"verdict_options.{name}",
                )
        steps = out.get("max_steps")
        if steps is not None:
            self._check_steps(steps, field="verdict_options.max_steps")
        return out

    def _check_steps(self, steps: Any, *, field: str = "max_steps") -> int:
        if isinstance(steps, bool) or not isinstance(steps, int):
            raise OptionInvalid(f"{field} must be an integer, got {steps!r}", field=field)
        if steps < 1:
            raise OptionInvalid(f"{field} is {steps}, it must be at least 1", field=field)
        if steps > self.settings.max_steps:
            raise LimitExceeded(
                f"{field} is {steps}, above the limit of {self.settings.max_steps}",
                limit="max_steps",
                value=steps,
                maximum=self.settings.max_steps,
            )
        return steps

    def _validate_fields(self, codec: Codec, key: str, fields: Any) -> Fields:
        """Check a memory's fields against the schema; return them normalised for storage."""
        if not isinstance(fields, dict):
            raise RecordInvalid("fields must be an object of field names to values", field="fields")
        self._check_field_count(len(fields), "the record")
        try:
            codec.encode_record(fields, key=key)
            out: Fields = {}
            for spec in codec.schema.fields:
                raw = fields.get(spec.name)
                self._check_text_length(spec.name, raw)
                if isinstance(raw, str) and _CONTROL_RE.search(raw):
                    # NUL and friends break exports and some databases' JSON, and no label
                    # legitimately holds them; tab and line breaks are allowed.
                    raise RecordInvalid(
                        f"field {spec.name!r} contains a control character", field=spec.name
                    )
                out[spec.name] = (
                    _json_value(codec.normalise(spec.name, raw)) if raw is not None else None
                )
        except RecordError as exc:
            raise RecordInvalid(str(exc), field=exc.field) from None
        # keep the caller's spelling for text and category (normalisation is for matching)
        for name, value in fields.items():
            if isinstance(value, str) and codec.schema.field(name).kind in ("text", "category"):
                out[name] = value
        return out

    def _check_field_count(self, count: int, what: str) -> None:
        if count > self.settings.max_fields:
            raise LimitExceeded(
                f"{what} has {count} fields, above the limit of {self.settings.max_fields}",
                limit="max_fields",
                value=count,
                maximum=self.settings.max_fields,
            )

    def _check_text_length(self, name: str, value: Any) -> None:
        if isinstance(value, str) and len(value) > self.settings.max_text_length:
            raise LimitExceeded(
                f"field {name!r} is {len(value)} characters long, above the limit of "
                f"{self.settings.max_text_length}",
                limit="max_text_length",
                value=len(value),
                maximum=self.settings.max_text_length,
            )

    # ------------------------------------------------------------------ collections

    def create_collection(self, team: str, spec: CollectionSpec) -> CollectionInfo:
        """Create a collection; 409 if the team already has one by that name."""
        _check_name(spec.name)
        schema = self._check_schema(spec.schema)
        self._check_rule(spec.rule, dict(spec.rule_options))
        verdict = self._check_verdict_options(dict(spec.verdict_options))
        if spec.seed is not None and (
            isinstance(spec.seed, bool)
            or not isinstance(spec.seed, int)
            or not 0 <= spec.seed < 2**63
        ):
            raise OptionInvalid("seed must be an integer in [0, 2^63)", field="seed")
        seed = spec.seed if spec.seed is not None else secrets.randbelow(2**62)
        if len(spec.description) > 2000:
            raise LimitExceeded(
                f"description is {len(spec.description)} characters, above the limit of 2000",
                limit="description_length",
                value=len(spec.description),
                maximum=2000,
            )
        with unit_of_work(self.sessions, write=True) as session:
            team_id = self._team_id(session, team)
            try:
                coll = CollectionRepository(session).create(
                    team_id,
                    spec.name,
                    schema=schema.to_dict(),
                    rule=spec.rule,
                    rule_options=dict(spec.rule_options),
                    verdict_options=verdict,
                    seed=seed,
                    description=spec.description,
                )
            except DuplicateNameError:
                raise CollectionExists(
                    f"collection {spec.name!r} already exists", collection=spec.name
                ) from None
            session.flush()
            return self._info(session, coll)

    def list_collections(self, team: str) -> list[CollectionInfo]:
        with unit_of_work(self.sessions, write=False) as session:
            team_id = self._team_id(session, team)
            return [self._info(session, c) for c in CollectionRepository(session).list(team_id)]

    def get_collection(self, team: str, name: str) -> CollectionInfo:
        with unit_of_work(self.sessions, write=False) as session:
            return self._info(session, self._collection(session, team, name))

    def update_collection(self, team: str, name: str, patch: CollectionPatch) -> CollectionInfo:
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            rule = patch.rule if patch.rule is not None else coll.rule
            options = (
                patch.rule_options
                if patch.rule_options is not None
                else (coll.rule_options if patch.rule is None else {})
            )
            self._check_rule(rule, dict(options))
            verdict = (
                self._check_verdict_options(dict(patch.verdict_options))
                if patch.verdict_options is not None
                else None
            )
            if patch.description is not None and len(patch.description) > 2000:
                raise LimitExceeded(
                    f"description is {len(patch.description)} characters, above the limit of 2000",
                    limit="description_length",
                    value=len(patch.description),
                    maximum=2000,
                )
            CollectionRepository(session).update(
                coll,
                description=patch.description,
                rule=patch.rule,
                rule_options=dict(options)
                if (patch.rule or patch.rule_options is not None)
                else None,
                verdict_options=verdict,
            )
            session.flush()
            session.refresh(coll)
            return self._info(session, coll)

    def delete_collection(self, team: str, name: str) -> None:
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            CollectionRepository(session).delete(coll.id)
            self.cache.discard(coll.id)

    # ------------------------------------------------------------------ memories

    def put_memory(self, team: str, name: str, key: str, fields: Any) -> PutResult:
        """Create or replace the memory ``key``; returns the collection's new revision."""
        check_key(key)
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            codec = self._codec(coll)
            clean = self._validate_fields(codec, key, fields)
            memories = MemoryRepository(session)
            existing = memories.get(coll.id, key)
            if existing is None and memories.count(coll.id) >= self.settings.max_memories:
                raise LimitExceeded(
                    f"collection {name!r} holds {self.settings.max_memories} memories, the "
                    "limit; delete some or raise max_memories",
                    limit="max_memories",
                    value=self.settings.max_memories + 1,
                    maximum=self.settings.max_memories,
                )
            created = memories.put(coll.id, key, clean)
            revision = CollectionRepository(session).bump_revision(coll.id)
            stored = memories.get(coll.id, key)
            assert stored is not None
            info = MemoryInfo(key, dict(stored.fields), stored.created_at, stored.updated_at)
            coll_id = coll.id
        self._after_write(coll_id, revision, [(key, clean)], [])
        return PutResult(memory=info, created=created, revision=revision)

    def get_memory(self, team: str, name: str, key: str) -> MemoryInfo:
        with unit_of_work(self.sessions, write=False) as session:
            coll = self._collection(session, team, name)
            mem = MemoryRepository(session).get(coll.id, key)
            if mem is None:
                raise MemoryNotFound(f"memory {key!r} does not exist in {name!r}", key=key)
            return MemoryInfo(mem.key, dict(mem.fields), mem.created_at, mem.updated_at)

    def delete_memory(self, team: str, name: str, key: str) -> int:
        """Delete a memory; returns the collection's new revision."""
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            if not MemoryRepository(session).delete(coll.id, key):
                raise MemoryNotFound(f"memory {key!r} does not exist in {name!r}", key=key)
            revision = CollectionRepository(session).bump_revision(coll.id)
            coll_id = coll.id
        self._after_write(coll_id, revision, [], [key])
        return revision

    def list_memories(
        self, team: str, name: str, cursor: str | None, limit: int | None
    ) -> MemoryPage:
        size = page_size(self.settings, limit)
        after = decode_cursor("k1", cursor) if cursor else None
        with unit_of_work(self.sessions, write=False) as session:
            coll = self._collection(session, team, name)
            page = MemoryRepository(session).page(coll.id, after, size)
            items = [
                MemoryInfo(m.key, dict(m.fields), m.created_at, m.updated_at) for m in page.items
            ]
            nxt = encode_cursor("k1", page.next_after) if page.next_after is not None else None
            return MemoryPage(items=items, next_cursor=nxt)

    def import_memories(
        self,
        team: str,
        name: str,
        rows: Iterable[tuple[int, str | None, Any] | RowError],
        *,
        skip_bad: bool = False,
    ) -> ImportReport:
        """Store many memories in one transaction.

        ``rows`` holds ``(row_number, key, fields)`` tuples or the :class:`RowError` a parser
        found. Unless ``skip_bad``, any bad row rejects the whole import and nothing is written.
        """
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            codec = self._codec(coll)
            good: dict[str, Fields] = {}
            errors: list[RowError] = []
            received = 0
            for item in rows:
                received += 1
                if isinstance(item, RowError):
                    errors.append(item)
                    continue
                row_no, key, fields = item
                try:
                    if key is None:
                        raise RecordInvalid("the row has no key", field="key")
                    check_key(key)
                    good[key] = self._validate_fields(codec, key, fields)
                except (RecordInvalid, LimitExceeded) as exc:
                    errors.append(
                        RowError(
                            row_no,
                            key,
                            exc.extra.get("field")
                            if isinstance(exc, RecordInvalid)
                            else exc.extra.get("limit"),
                            str(exc),
                        )
                    )
                if len(errors) > 1000 and not skip_bad:
                    break
            if errors and not skip_bad:
                raise ImportRejected(
                    f"{len(errors)} of {received} rows are bad; nothing was written "
                    "(send skip_bad=true to store the good rows)",
                    errors=[e.__dict__ for e in errors[:1000]],
                )
            memories = MemoryRepository(session)
            existing = memories.keys_existing(coll.id, list(good))
            total = memories.count(coll.id) + len(set(good) - existing)
            if total > self.settings.max_memories:
                raise LimitExceeded(
                    f"the import would bring {name!r} to {total} memories, above the limit of "
                    f"{self.settings.max_memories}",
                    limit="max_memories",
                    value=total,
                    maximum=self.settings.max_memories,
                )
            counts = memories.bulk_put(coll.id, list(good.items())) if good else None
            revision = (
                CollectionRepository(session).bump_revision(coll.id) if good else coll.revision
            )
            coll_id = coll.id
        if good:
            self._after_write(coll_id, int(revision), list(good.items()), [])
        return ImportReport(
            received=received,
            written=len(good),
            created=counts.created if counts else 0,
            replaced=counts.replaced if counts else 0,
            skipped=len(errors),
            errors=errors,
            revision=int(revision),
        )

    # ------------------------------------------------------------------ compile

    def _compile(self, session: Any, coll: Collection) -> CompiledMemory:
        """Build the compiled memory of ``coll`` at its current revision from the database."""

        started = time.perf_counter()
        codec = self._codec(coll)
        rows = MemoryRepository(session).all_ordered(coll.id)
        if not rows:
            raise EmptyCollection(
                f"collection {coll.name!r} has no memories yet", collection=coll.name
            )
        keys = [k for k, _ in rows]
        fields = [dict(f) for _, f in rows]
        patterns = codec.encode_records(fields, keys=keys)
        rule = make_rule(coll.rule, **coll.rule_options)
        try:
            rule.fit(patterns)
        except DependentMemoryError as exc:
            named = [keys[i] for i in exc.indices if 0 <= i < len(keys)]
            raise DependentMemories(
                f"the {coll.rule} rule cannot store these memories together: "
                f"{', '.join(map(repr, named[:20]))} are duplicates or linearly dependent "
                "(delete one, or use the dense rule)",
                keys=named[:100],
            ) from None
        options = dict(coll.verdict_options)
        thresholds, calibration = self._thresholds(options, rule, codec, fields, keys, coll.seed)
        candidates = self._candidates(codec, fields)
        report = capacity_report(rule).to_dict()
        compiled = CompiledMemory(
            collection_id=coll.id,
            revision=int(coll.revision),
            rule=rule,
            codec=codec,
            keys=keys,
            fields=fields,
            index={k: i for i, k in enumerate(keys)},
            thresholds=thresholds,
            calibrated_count=len(keys),
            candidates=candidates,
            checksum=rule.checksum(),
            report={
                "capacity": report,
                "revision": int(coll.revision),
                "thresholds": thresholds.to_dict(),
                "calibration": calibration,
                "duration_ms": (time.perf_counter() - started) * 1000.0,
                "compiled_at": _now().isoformat(),
            },
        )
        return compiled

    def _thresholds(
        self,
        options: dict[str, Any],
        rule: Any,
        codec: Codec,
        fields: list[Fields],
        keys: list[str],
        seed: int,
    ) -> tuple[VerdictThresholds, dict[str, Any]]:
        calibration: dict[str, Any] = {}
        base = VerdictThresholds()
        if options.get("calibrate", True) and len(keys) >= MIN_CALIBRATION_MEMORIES:
            result = calibrate(rule, codec, fields, keys, seed=int(seed) % 2**32)
            base = result.thresholds
            calibration = result.to_dict()
        overrides = {k: float(options[k]) for k in THRESHOLD_OPTIONS if options.get(k) is not None}
        if overrides:
            base = VerdictThresholds(**{**base.to_dict(), **overrides})
        return base, calibration

    def _candidates(self, codec: Codec, fields: list[Fields]) -> dict[str, FieldCandidates]:
        out: dict[str, FieldCandidates] = {}
        for spec in codec.schema.fields:
            seen: dict[Any, int] = {}
            values: list[FieldValue] = []
            of_memory = np.empty(len(fields), dtype=np.int64)
            for i, rec in enumerate(fields):
                raw = rec.get(spec.name)
                norm = codec.normalise(spec.name, raw) if raw is not None else None
                if norm not in seen:
                    seen[norm] = len(values)
                    values.append(raw if spec.kind in ("text", "category") else _json_value(norm))
                of_memory[i] = seen[norm]
            codes = np.stack([codec.encode_value(spec.name, v) for v in values])
            out[spec.name] = FieldCandidates.from_codes(values, codes, of_memory)
        return out

    def _compiled(self, session: Any, coll: Collection) -> CompiledMemory:
        """The compiled memory at the collection's revision, from cache or built now."""
        cached = self.cache.get(coll.id)
        if cached is not None and cached.revision == coll.revision:
            return cached
        with self.cache.compile_lock(coll.id):
            cached = self.cache.get(coll.id)
            if cached is not None and cached.revision == coll.revision:
                return cached
            compiled = self._compile(session, coll)
            self.cache.put(compiled)
            return compiled

    def _after_write(
        self,
        collection_id: int,
        revision: int,
        upserts: Sequence[tuple[str, Fields]],
        deletes: Sequence[str],
    ) -> None:
        """Bring this worker's cached memory to ``revision`` incrementally, or drop it."""
        cached = self.cache.get(collection_id)
        if cached is None:
            return
        removes = bool(deletes) or any(key in cached.index for key, _ in upserts)
        if cached.revision != revision - 1 or (removes and not cached.rule.supports_remove):
            self.cache.discard(collection_id)
            return
        grown = len(cached.keys) + len(upserts)
        # thresholds were calibrated on the memories of the time; recompile when far off
        if abs(grown - cached.calibrated_count) > 0.2 * max(cached.calibrated_count, 1) or (
            len(upserts) + len(deletes) > 64
        ):
            self.cache.discard(collection_id)
            return
        try:
            rule = cached.copy_rule()
            keys = list(cached.keys)
            fields = list(cached.fields)
            for key in deletes:
                i = keys.index(key) if key in keys else -1
                if i >= 0:
                    rule.remove(i)
                    del keys[i]
                    del fields[i]
            for key, rec in upserts:
                if key in keys:
                    i = keys.index(key)
                    rule.remove(i)
                    del keys[i]
                    del fields[i]
                rule.add(cached.codec.encode_record(rec, key=key))
                keys.append(key)
                fields.append(dict(rec))
        except EngineError:
            self.cache.discard(collection_id)
            return
        updated = cached.with_rule(
            revision=revision,
            rule=rule,
            keys=keys,
            fields=fields,
            index={k: i for i, k in enumerate(keys)},
            candidates=self._candidates(cached.codec, fields),
            checksum=rule.checksum(),
        )
        self.cache.put(updated)

    def compile(self, team: str, name: str) -> CompileInfo:
        """Compile now (always a full compile), store and return the compile report."""
        with unit_of_work(self.sessions, write=True) as session:
            coll = self._collection(session, team, name)
            with self.cache.compile_lock(coll.id):
                compiled = self._compile(session, coll)
                self.cache.put(compiled)
            return self._store_report(session, coll, compiled)

    def _store_report(
        self, session: Any, coll: Collection, compiled: CompiledMemory
    ) -> CompileInfo:
        rep = compiled.report
        CompileReportRepository(session).add(
            coll.id,
            revision=compiled.revision,
            rule=coll.rule,
            n_memories=len(compiled.keys),
            n_units=compiled.codec.schema.n_units,
            weights_checksum=compiled.checksum,
            report=rep,
            duration_ms=float(rep.get("duration_ms", 0.0)),
        )
        return CompileInfo(
            revision=compiled.revision,
            rule=coll.rule,
            n_memories=len(compiled.keys),
            n_units=compiled.codec.schema.n_units,
            checksum=compiled.checksum,
            duration_ms=float(rep.get("duration_ms", 0.0)),
            thresholds=dict(rep.get("thresholds", {})),
            capacity=dict(rep.get("capacity", {})),
            compiled_at=datetime.fromisoformat(str(rep["compiled_at"])),
        )

    def warm(self) -> int:
        """Compile every collection into the cache (largest budget first come, first served).

        Returns how many were compiled; a collection that cannot be compiled (empty, dependent
        memories) is skipped, its first recall will say why.
        """
        with unit_of_work(self.sessions, write=False) as session:
            ids = [c.id for c in CollectionRepository(session).list_all()]
        done = 0
        for coll_id in ids:
            try:
                with unit_of_work(self.sessions, write=False) as session:
                    coll = CollectionRepository(session).get_by_id(coll_id)
                    if coll is None:
                        continue
                    self._compiled(session, coll)
                    done += 1
            except ServiceError:
                continue
        return done

    def capacity(self, team: str, name: str) -> CapacityInfo:
        with unit_of_work(self.sessions, write=False) as session:
            coll = self._collection(session, team, name)
            compiled = self._compiled(session, coll)
            cached = compiled.report.get("capacity")
            if cached is not None and compiled.report.get("revision") == compiled.revision:
                report = dict(cached)
            else:  # updated incrementally since the last full compile
                report = capacity_report(compiled.rule).to_dict()
            report["checksum"] = compiled.checksum
            report["thresholds"] = compiled.thresholds.to_dict()
            return CapacityInfo(revision=compiled.revision, report=report)

    # ------------------------------------------------------------------ recall

    def _check_options(self, options: RecallOptions) -> None:
        if options.mode not in ("sync", "async"):
            raise OptionInvalid(f"mode must be sync or async, got {options.mode!r}", field="mode")
        if (
            isinstance(options.top_k, bool)
            or not isinstance(options.top_k, int)
            or not (1 <= options.top_k <= 100)
        ):
            raise OptionInvalid(
                f"top_k must be an integer from 1 to 100, got {options.top_k!r}", field="top_k"
            )

    def _current(self, team: str, name: str, options: RecallOptions) -> tuple[CompiledMemory, int]:
        """The collection's compiled memory at its current revision, and the step limit.

        One light query reads the revision, so a write on any worker is seen by the very next
        recall; the ORM path (and a compile) runs only when the cache is behind or the
        collection is missing.
        """
        current = self._revisions.read(team, name)
        cached = self.cache.get(current.id) if current is not None else None
        if current is not None and cached is not None and cached.revision == current.revision:
            compiled, verdict_options = cached, current.verdict_options
        else:
            with unit_of_work(self.sessions, write=False) as session:
                coll = self._collection(session, team, name)
                compiled, verdict_options = self._compiled(session, coll), coll.verdict_options
        default_steps = verdict_options.get("max_steps")
        steps = self._check_steps(
            options.max_steps
            if options.max_steps is not None
            else (default_steps or min(100, self.settings.max_steps))
        )
        return compiled, steps

    def _encode_cue(self, codec: Codec, cue: Any, i: int, n_cues: int) -> np.ndarray:
        """Cue ``i`` of ``n_cues`` encoded, or :class:`CueInvalid` naming it."""
        if not isinstance(cue, dict):
            raise CueInvalid(
                f"cue {i} must be an object of field names to values", field=f"cues[{i}]", cue=i
            )
        self._check_field_count(len(cue), f"cue {i}" if n_cues > 1 else "the cue")
        for fname, value in cue.items():
            self._check_text_length(fname, value)
        try:
            return codec.encode_cue(cue)
        except RecordError as exc:
            where = f"cue {i}: " if n_cues > 1 else ""
            raise CueInvalid(f"{where}{exc}", field=exc.field, cue=i) from None

    def check_batch(self, cues: Sequence[Any]) -> None:
        """Refuse a batch with no cue (:class:`CueInvalid`) or more than ``max_batch``
        (:class:`LimitExceeded`, 413), as :meth:`recall` does."""
        if not cues:
            raise CueInvalid("at least one cue is needed", field="cues")
        if len(cues) > self.settings.max_batch:
            raise LimitExceeded(
                f"{len(cues)} cues in one batch, above the limit of {self.settings.max_batch}",
                limit="max_batch",
                value=len(cues),
                maximum=self.settings.max_batch,
                status=413,
            )

    def recall(
        self, team: str, name: str, cues: Sequence[Any], options: RecallOptions
    ) -> list[RecallResult]:
        """Settle each cue and judge where it landed; results in the order of the cues.

        One invalid cue refuses the whole call (:class:`CueInvalid` names it).
        """
        self.check_batch(cues)
        self._check_options(options)
        compiled, steps = self._current(team, name, options)
        encoded = [self._encode_cue(compiled.codec, c, i, len(cues)) for i, c in enumerate(cues)]
        return self._execute(compiled, np.stack(encoded), options, steps)

    def recall_each(
        self, team: str, name: str, cues: Sequence[Any], options: RecallOptions
    ) -> list[RecallResult | ServiceError]:
        """Independent single-cue recalls settled together in one product.

        Each cue is judged as if it came alone (results are the same as one call each); an
        invalid cue gets its own :class:`CueInvalid` in its place and the others are answered.
        Errors of the collection or the options apply to all and are raised.
        """
        self._check_options(options)
        compiled, steps = self._current(team, name, options)
        refused: dict[int, ServiceError] = {}
        encoded: list[np.ndarray] = []
        for i, cue in enumerate(cues):
            try:
                encoded.append(self._encode_cue(compiled.codec, cue, 0, 1))
            except ServiceError as exc:
                refused[i] = exc
        answered = iter(
            self._execute(compiled, np.stack(encoded), options, steps) if encoded else []
        )
        out: list[RecallResult | ServiceError] = [
            refused[i] if i in refused else next(answered) for i in range(len(cues))
        ]
        return out

    def _execute(
        self,
        compiled: CompiledMemory,
        cue_matrix: np.ndarray,
        options: RecallOptions,
        steps: int,
    ) -> list[RecallResult]:
        """Settle, judge and decode already-encoded cues against one compiled memory, in runs
        of at most :data:`RUN_CUES` (each cue's result is independent of the others)."""
        return [
            r
            for start in range(0, cue_matrix.shape[0], RUN_CUES)
            for r in self._execute_run(
                compiled, cue_matrix[start : start + RUN_CUES], options, steps
            )
        ]

    def _execute_run(
        self,
        compiled: CompiledMemory,
        cue_matrix: np.ndarray,
        options: RecallOptions,
        steps: int,
    ) -> list[RecallResult]:
        """:meth:`_execute` for one run of cues."""
        codec = compiled.codec
        result = settle(
            compiled.rule,
            cue_matrix,
            mode=options.mode,
            clamp=options.clamp,
            max_steps=steps,
            record_energy=options.include_energy,
        )
        verdicts = judge(
            compiled.rule,
            cue_matrix,
            result,
            compiled.thresholds,
            top_k=options.top_k,
            blocks=list(codec.schema.slices.values()),
        )
        # an overlap of exactly 1 is a state equal to its best memory's pattern
        decoded = self._decode(compiled, result.states, verdicts.best, verdicts.overlap == 1.0)
        # Columns as Python lists once, not numpy scalars cue by cue: same values, a third of
        # the time for a batch
        keys, fields = compiled.keys, compiled.fields
        best: list[int] = verdicts.best.tolist()
        overlap, margin, cue_overlap, cue_margin, cue_agreement, field_agreement = (
            _rounded(a, 6)
            for a in (
                verdicts.overlap,
                verdicts.margin,
                verdicts.cue_overlap,
                verdicts.cue_margin,
                verdicts.cue_agreement,
                verdicts.field_agreement,
            )
        )
        nearest: list[list[int]] = verdicts.nearest.tolist()
        nearest_overlap: list[list[float]] = verdicts.nearest_overlap.tolist()
        taken: list[int] = verdicts.steps.tolist()
        converged: list[bool] = verdicts.converged.tolist()
        cycle_length: list[int] = verdicts.cycle_length.tolist()
        out: list[RecallResult] = []
        for i, verdict in enumerate(verdicts.verdict):
            b = best[i]
            out.append(
                RecallResult(
                    verdict=verdict,  # type: ignore[arg-type]
                    reason=verdicts.reason[i],
                    memory=(
                        RecalledMemory(keys[b], dict(fields[b])) if verdict == "recalled" else None
                    ),
                    best_key=keys[b],
                    overlap=overlap[i],
                    margin=margin[i],
                    cue_overlap=cue_overlap[i],
                    cue_margin=cue_margin[i],
                    cue_agreement=cue_agreement[i],
                    field_agreement=field_agreement[i],
                    fields=decoded[i],
                    nearest=[
                        Neighbour(keys[j], round(m, 6))
                        for j, m in zip(nearest[i], nearest_overlap[i], strict=True)
                    ],
                    steps=taken[i],
                    converged=converged[i],
                    cycle_length=cycle_length[i],
                    revision=compiled.revision,
                    energy=(
                        [float(e) for e in result.energies[i]]
                        if result.energies is not None
                        else None
                    ),
                )
            )
        return out

    def _decode(
        self,
        compiled: CompiledMemory,
        states: np.ndarray,
        nearest: np.ndarray,
        whole: np.ndarray,
    ) -> list[dict[str, DecodedField]]:
        """Each state's fields: per block, the stored value whose code is nearest.

        ``whole`` marks states that are their nearest memory's pattern, whose every block is
        that memory's own value's code (a pattern is its fields' codes side by side): those
        are not compared again.
        """
        slices = compiled.codec.schema.slices
        per_cue: list[dict[str, DecodedField]] = [{} for _ in range(states.shape[0])]
        rest = np.flatnonzero(~whole)
        sf = states[rest].astype(np.float32) if rest.size else None
        for name, cand in compiled.candidates.items():
            own = cand.of_memory[nearest]  # each state's nearest memory's own value
            for i, j in enumerate(own.tolist()):
                per_cue[i][name] = cand.exact(j)
            if sf is None:
                continue  # every state is its memory's pattern: nothing to compare
            block = sf[:, slices[name]]
            d = block.shape[1]
            # Where a block is exactly that value's code, the value scores the maximum, 1, and
            # wins the tie rule below: the answer is known without the product (the common
            # case, a settled state on a stored memory).
            miss = np.flatnonzero(~(block == cand.codes(own[rest])).all(axis=1))
            if not miss.size:
                continue
            rows = rest[miss]  # the states whose block is not their memory's value's code
            full = cand.scores(block[miss])  # (rows, n_values)
            # on equal scores, the nearest memory's own value wins
            ranked = full.astype(np.float64)
            ranked[np.arange(rows.size), own[rows]] += 1e-9
            picked = np.argmax(ranked, axis=1)
            scores = full[np.arange(rows.size), picked].astype(np.float64)
            root = math.sqrt(d)
            for i, j, m in zip(rows.tolist(), picked.tolist(), scores.tolist(), strict=True):
                per_cue[i][name] = (
                    cand.exact(j)
                    if m == 1.0
                    else DecodedField(value=cand.values[j], score=round(m, 6), z=round(root * m, 3))
                )
        return per_cue
