"""The practitioner's commands of ``cuebank``: collections, import, recall, export, reconcile.

They talk to a running service through :mod:`service.client` (URL and key from ``--url`` /
``--key`` or ``CUEBANK_URL`` / ``CUEBANK_KEY``). Only ``reconcile --local`` runs the engine in
this process, against an exported collection file, with no server at all.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import IO, Any, Final

from service.cli import EXIT_OK, EXIT_PARTIAL, EXIT_SERVER, EXIT_USAGE, CommandError
from service.client import Client, CuebankError, InvalidInput, Json, NotFound

__all__ = ["COMMANDS", "add_parsers", "read_rows"]

URL_ENV: Final = "CUEBANK_URL"
KEY_ENV: Final = "CUEBANK_KEY"
DEFAULT_URL: Final = "http://127.0.0.1:8000"
IMPORT_BATCH: Final = 500
LOCAL_BATCH: Final = 256

Factory = Callable[[str, str, str], argparse.ArgumentParser]


# ---------------------------------------------------------------------- parsers


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a number of at least 1, got {value}")
    return value


def _server_options(sub: argparse.ArgumentParser) -> None:
    sub.add_argument(
        "--url",
        metavar="URL",
        help=f"the service's base URL (default: {URL_ENV} or {DEFAULT_URL})",
    )
    sub.add_argument(
        "--key",
        metavar="KEY",
        help=f"API key sent as 'Authorization: Bearer KEY' (default: {KEY_ENV})",
    )


def _collection_option(sub: argparse.ArgumentParser) -> None:
    sub.add_argument("--collection", "-c", required=True, metavar="NAME", help="collection name")


def _format_option(sub: argparse.ArgumentParser, what: str) -> None:
    sub.add_argument(
        "--format",
        choices=("csv", "ndjson"),
        help=f"format of {what} (default: from the file name, .csv or .ndjson/.jsonl)",
    )


def add_parsers(command: Factory) -> None:
    """Add the toolkit's subcommands through ``command(name, summary, description)``."""
    coll = command(
        "collection",
        "create, list, show or delete collections",
        "Manage the team's collections. 'create' reads a JSON file with the collection's name, "
        "schema, rule and options (the body of POST /v1/collections).",
    )
    _server_options(coll)
    actions = coll.add_subparsers(dest="action", metavar="ACTION", required=True)
    create = actions.add_parser(
        "create", help="create a collection from a JSON file", description="Create a collection."
    )
    create.add_argument(
        "--file",
        "-f",
        required=True,
        type=Path,
        metavar="FILE",
        help="JSON file: {name, schema: {fields: [...]}, rule, rule_options, ...}",
    )
    _server_options(create)
    listing = actions.add_parser(
        "list", help="list the collections", description="List the team's collections."
    )
    _server_options(listing)
    for name, summary in (("show", "show one collection"), ("delete", "delete a collection")):
        sub = actions.add_parser(name, help=summary, description=summary.capitalize() + ".")
        sub.add_argument("name", metavar="NAME", help="collection name")
        _server_options(sub)

    imp = command(
        "import",
        "import memories from a CSV or NDJSON file, in batches, resumably",
        "Send FILE to the collection's imports endpoint in batches, with a progress line on "
        "stderr. A CSV needs a 'key' column and one column per field; NDJSON lines are "
        '{"key": ..., "fields": {...}}. With --resume, keys already stored are skipped, so an '
        "interrupted import can simply be run again.",
    )
    imp.add_argument("file", type=Path, metavar="FILE", help="the CSV or NDJSON file")
    _collection_option(imp)
    _format_option(imp, "FILE")
    imp.add_argument(
        "--batch-size",
        type=_positive,
        default=IMPORT_BATCH,
        metavar="N",
        help=f"rows per request (default: {IMPORT_BATCH})",
    )
    imp.add_argument(
        "--resume",
        action="store_true",
        help="list the keys already stored first and skip those rows",
    )
    imp.add_argument(
        "--skip-bad",
        action="store_true",
        help="store the good rows of a batch and report the bad ones (exit code 4)",
    )
    imp.add_argument(
        "--max-batches",
        type=_positive,
        metavar="N",
        help="stop after N batches (exit code 4); for trying out a large file",
    )
    _server_options(imp)

    rec = command(
        "recall",
        "recall the memory a fragment belongs to",
        "Recall from the fields given with --field NAME=VALUE (repeatable), or from a JSON cue "
        'object read from stdin when no --field is given, e.g. {"taxon": "Thalora marensis"}. '
        "Prints the verdict and the completed record as a table, or the answer as JSON.",
    )
    _collection_option(rec)
    rec.add_argument(
        "--field",
        "-F",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="a known field; number fields are sent as numbers (repeatable)",
    )
    rec.add_argument("--json", action="store_true", help="print the service's JSON answer")
    rec.add_argument(
        "--top-k", type=_positive, default=3, metavar="K", help="nearest memories to list"
    )
    _server_options(rec)

    cap = command(
        "capacity",
        "report how close a collection is to its storage capacity",
        "Print the collection's capacity report: load, correlations, stability, predicted bit "
        "error, and the rule the service advises.",
    )
    _collection_option(cap)
    cap.add_argument("--json", action="store_true", help="print the report as JSON")
    _server_options(cap)

    exp = command(
        "export",
        "write a collection's memories as CSV or NDJSON",
        "Page through every memory of the collection in key order and write it in the import "
        "format (CSV: key + one column per field; NDJSON: key and fields).",
    )
    _collection_option(exp)
    exp.add_argument(
        "--format", choices=("csv", "ndjson"), default="csv", help="output format (default: csv)"
    )
    exp.add_argument(
        "--output", "-o", type=Path, metavar="FILE", help="write here instead of stdout"
    )
    _server_options(exp)

    recon = command(
        "reconcile",
        "recall every fragment of a file and write the per-row verdicts",
        "Upload FILE (CSV or NDJSON; an optional 'ref' or 'row_id' column plus any fields, "
        "empty meaning unknown) as a reconciliation job, show its progress on stderr and write "
        "the result (one row per fragment, in input order) to --output or stdout. With --local "
        "EXPORT the fragments are recalled in this process against an exported collection "
        "file, with no server; --schema then gives the collection's JSON file.",
    )
    recon.add_argument("file", type=Path, metavar="FILE", help="the fragments file")
    _collection_option(recon)
    _format_option(recon, "FILE")
    recon.add_argument(
        "--output", "-o", type=Path, metavar="FILE", help="write the result here, not stdout"
    )
    recon.add_argument(
        "--result-format",
        choices=("csv", "ndjson"),
        default="csv",
        help="format of the result (default: csv)",
    )
    recon.add_argument(
        "--local",
        type=Path,
        metavar="EXPORT",
        help="recall locally against this export (from 'cuebank export') instead of a server",
    )
    recon.add_argument(
        "--schema",
        type=Path,
        metavar="FILE",
        help="with --local: the collection's JSON file (as for 'collection create')",
    )
    recon.add_argument(
        "--poll", type=float, default=0.5, metavar="SECONDS", help="progress interval"
    )
    _server_options(recon)


# ---------------------------------------------------------------------- helpers


def _client(args: argparse.Namespace) -> Client:
    url = args.url or os.environ.get(URL_ENV) or DEFAULT_URL
    key = args.key or os.environ.get(KEY_ENV) or None
    return Client(url, key)


def _fail(exc: CuebankError) -> CommandError:
    code = EXIT_USAGE if isinstance(exc, InvalidInput | NotFound) else EXIT_SERVER
    return CommandError(f"{exc.detail} [{exc.slug}]", code)


def _file_format(path: Path, given: str | None) -> str:
    if given:
        return given
    suffix = path.suffix.lower()
    if suffix == ".csv":
        return "csv"
    if suffix in (".ndjson", ".jsonl"):
        return "ndjson"
    raise CommandError(
        f"cannot tell the format of {path.name}; name it .csv or .ndjson, or pass --format",
        EXIT_USAGE,
    )


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise CommandError(f"cannot read {path}: {exc.strerror or exc}", EXIT_USAGE) from None


def _read_json(path: Path) -> Any:
    try:
        return json.loads(_read_bytes(path))
    except json.JSONDecodeError as exc:
        raise CommandError(f"{path} is not valid JSON: {exc}", EXIT_USAGE) from None


def read_rows(data: bytes, fmt: str) -> tuple[list[str] | None, list[tuple[str, Any]]]:
    """The header (CSV) and the ``(key, raw row)`` pairs of an import file.

    >>> read_rows(b"key,depth_m\\nSMP-1,2.5\\n", "csv")
    (['key', 'depth_m'], [('SMP-1', ['SMP-1', '2.5'])])
    """
    text = data.decode("utf-8-sig")
    if fmt == "csv":
        reader = csv.reader(io.StringIO(text, newline=""))
        header = next(reader, None)
        if header is None or "key" not in [h.strip() for h in header]:
            raise CommandError("the CSV needs a header row with a 'key' column", EXIT_USAGE)
        at = [h.strip() for h in header].index("key")
        rows = [(r[at].strip() if len(r) > at else "", r) for r in reader if any(r)]
        return header, rows
    out: list[tuple[str, Any]] = []
    for line in text.splitlines():
        if line.strip():
            try:
                key = json.loads(line).get("key", "")
            except (json.JSONDecodeError, AttributeError):
                key = ""
            out.append((str(key), line))
    return None, out


def _batch_body(header: list[str] | None, rows: Sequence[tuple[str, Any]]) -> str:
    if header is None:
        return "\n".join(str(line) for _, line in rows) + "\n"
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(raw for _, raw in rows)
    return buffer.getvalue()


class _Progress:
    """One self-overwriting stderr line: done/total, rows/s, ETA."""

    def __init__(self, total: int, what: str) -> None:
        self.total, self.what = total, what
        self.started = time.monotonic()

    def show(self, done: int, note: str = "") -> None:
        elapsed = max(time.monotonic() - self.started, 1e-6)
        rate = done / elapsed
        eta = (self.total - done) / rate if rate > 0 else 0.0
        line = (
            f"\r{self.what}: {done}/{self.total} rows  {rate:,.0f} rows/s  ETA {eta:,.0f} s{note}"
        )
        print(line.ljust(72), end="", file=sys.stderr, flush=True)

    def end(self) -> None:
        print(file=sys.stderr, flush=True)


# ---------------------------------------------------------------------- commands


def run_collection(args: argparse.Namespace) -> int:
    with _client(args) as cb:
        try:
            if args.action == "create":
                spec = _read_json(args.file)
                if not isinstance(spec, dict):
                    raise CommandError(f"{args.file} must hold a JSON object", EXIT_USAGE)
                made = cb.create_collection(spec)
                print(
                    f"created collection '{made['name']}' ({made['n_units']} units, "
                    f"rule {made['rule']})"
                )
            elif args.action == "list":
                items = cb.list_collections()
                print(f"{'NAME':24} {'RULE':10} {'MEMORIES':>9} {'UNITS':>6}  DESCRIPTION")
                for c in items:
                    print(
                        f"{c['name']:24} {c['rule']:10} {c['n_memories']:>9} "
                        f"{c['n_units']:>6}  {c['description']}"
                    )
            elif args.action == "show":
                print(json.dumps(cb.get_collection(args.name), indent=2, ensure_ascii=False))
            else:
                cb.delete_collection(args.name)
                print(f"deleted collection '{args.name}'")
        except CuebankError as exc:
            raise _fail(exc) from None
    return EXIT_OK


def _stored_keys(cb: Client, name: str) -> set[str]:
    return {item["key"] for item in cb.iter_memories(name, page_size=500)}


def run_import(args: argparse.Namespace) -> int:
    fmt = _file_format(args.file, args.format)
    header, rows = read_rows(_read_bytes(args.file), fmt)
    written = skipped_bad = batches = 0
    with _client(args) as cb:
        try:
            cb.get_collection(args.collection)
            if args.resume:
                stored = _stored_keys(cb, args.collection)
                before = len(rows)
                rows = [r for r in rows if r[0] not in stored]
                print(f"resume: {before - len(rows)} rows already stored, skipped", file=sys.stderr)
            progress = _Progress(len(rows), "import")
            for start in range(0, len(rows), args.batch_size):
                if args.max_batches is not None and batches >= args.max_batches:
                    progress.end()
                    print(
                        f"stopped after {batches} batches (--max-batches); run again with "
                        "--resume to go on",
                        file=sys.stderr,
                    )
                    return EXIT_PARTIAL
                chunk = rows[start : start + args.batch_size]
                report = cb.import_memories(
                    args.collection,
                    _batch_body(header, chunk),
                    format=fmt,  # type: ignore[arg-type]
                    skip_bad=args.skip_bad,
                )
                batches += 1
                written += int(report["written"])
                skipped_bad += int(report["skipped"])
                progress.show(start + len(chunk))
            progress.end()
        except CuebankError as exc:
            print(file=sys.stderr)
            error = _fail(exc)
            if written:
                error.code = EXIT_PARTIAL
                error.args = (
                    f"{error} ({written} rows were stored before this; run again with --resume)",
                )
            raise error from None
    print(
        f"imported {written} rows into '{args.collection}'"
        + (f"; {skipped_bad} bad rows skipped" if skipped_bad else "")
    )
    return EXIT_PARTIAL if skipped_bad else EXIT_OK


def _kinds(cb: Client, name: str) -> dict[str, str]:
    info = cb.get_collection(name)
    return {str(f["name"]): str(f["kind"]) for f in info["schema"]["fields"]}


def _cue_from_args(fields: Sequence[str], kinds: dict[str, str]) -> dict[str, Any]:
    cue: dict[str, Any] = {}
    for item in fields:
        name, sep, value = item.partition("=")
        if not sep or not name:
            raise CommandError(f"--field takes NAME=VALUE, got {item!r}", EXIT_USAGE)
        if name not in kinds:
            raise CommandError(
                f"no field {name!r} in this collection (fields: {', '.join(kinds)})", EXIT_USAGE
            )
        if kinds[name] == "number":
            try:
                cue[name] = float(value)
            except ValueError:
                raise CommandError(
                    f"field {name!r} is a number, got {value!r}", EXIT_USAGE
                ) from None
        else:
            cue[name] = value
    return cue


def _print_recall(answer: Json) -> None:
    memory = answer.get("memory") or {}
    print(f"verdict   {answer['verdict']} ({answer['reason']})")
    print(f"memory    {memory.get('key', '-')}   (nearest: {answer['best_key']})")
    print(
        f"overlap   {answer['overlap']:.3f}   margin {answer['margin']:.3f}   "
        f"cue margin {answer['cue_margin']:.3f}"
    )
    print()
    print(f"{'FIELD':16} {'VALUE':32} SCORE")
    for name, decoded in answer["fields"].items():
        value = "" if decoded["value"] is None else str(decoded["value"])
        print(f"{name:16} {value:32} {decoded['score']:.3f}")
    if answer.get("nearest"):
        print()
        print("nearest: " + ", ".join(f"{n['key']} {n['overlap']:.3f}" for n in answer["nearest"]))


def run_recall(args: argparse.Namespace) -> int:
    with _client(args) as cb:
        try:
            if args.field:
                cue = _cue_from_args(args.field, _kinds(cb, args.collection))
            else:
                try:
                    cue = json.loads(sys.stdin.read() or "null")
                except json.JSONDecodeError as exc:
                    raise CommandError(f"stdin is not a JSON cue: {exc}", EXIT_USAGE) from None
                if not isinstance(cue, dict):
                    raise CommandError(
                        "give --field NAME=VALUE, or a JSON object on stdin", EXIT_USAGE
                    )
            answer = cb.recall(args.collection, cue, top_k=args.top_k)
        except CuebankError as exc:
            raise _fail(exc) from None
    if args.json:
        print(json.dumps(answer, indent=2, ensure_ascii=False))
    else:
        _print_recall(answer)
    return EXIT_OK


def run_capacity(args: argparse.Namespace) -> int:
    with _client(args) as cb:
        try:
            doc = cb.capacity(args.collection)
        except CuebankError as exc:
            raise _fail(exc) from None
    if args.json:
        print(json.dumps(doc, indent=2))
        return EXIT_OK
    r = doc["report"]
    print(f"collection '{args.collection}' at revision {doc['revision']}")
    print(f"  rule               {r['rule']} ({r['n_memories']} memories, {r['n_units']} units)")
    print(f"  load               {r['load']:.4f}  (memories / units)")
    print(f"  capacity used      {r['capacity_used']:.1%} of ~{r['rule_capacity']:,.0f}")
    print(
        f"  overlaps           mean |m| {r['mean_abs_overlap']:.3f}, max |m| "
        f"{r['max_abs_overlap']:.3f} (chance {r['chance_overlap']:.3f})"
    )
    print(
        f"  stable memories    {r['fixed_point_fraction']:.1%} of {r['checked_memories']} checked"
    )
    print(f"  predicted bit err  {r['predicted_bit_error']:.2e}")
    print(f"  duplicates         {r['duplicates']}")
    print(f"  recommended rule   {r['recommended_rule']}")
    print(f"  advice             {r['advice']}")
    return EXIT_OK


def _write_export(cb: Client, name: str, fmt: str, out: IO[str]) -> int:
    fields = list(_kinds(cb, name))
    writer = csv.writer(out, lineterminator="\n") if fmt == "csv" else None
    if writer is not None:
        writer.writerow(["key", *fields])
    count = 0
    for item in cb.iter_memories(name):
        if writer is not None:
            values = item["fields"]
            writer.writerow(
                [item["key"], *("" if values.get(f) is None else values[f] for f in fields)]
            )
        else:
            line = {"key": item["key"], "fields": item["fields"]}
            out.write(json.dumps(line, ensure_ascii=False) + "\n")
        count += 1
    return count


def run_export(args: argparse.Namespace) -> int:
    with _client(args) as cb:
        try:
            if args.output is None:
                count = _write_export(cb, args.collection, args.format, sys.stdout)
            else:
                with args.output.open("w", encoding="utf-8", newline="") as out:
                    count = _write_export(cb, args.collection, args.format, out)
        except CuebankError as exc:
            raise _fail(exc) from None
    print(f"exported {count} memories of '{args.collection}'", file=sys.stderr)
    return EXIT_OK


def _emit(text: str, output: Path | None) -> None:
    if output is None:
        sys.stdout.write(text)
    else:
        output.write_text(text, encoding="utf-8", newline="")


def _summary(job: Json) -> str:
    counts = job["counts"]
    parts = [f"{counts.get(v, 0)} {v}" for v in ("recalled", "spurious", "unsettled", "invalid")]
    reasons = job.get("reasons", {}).get("spurious", {})
    detail = f" (spurious: {', '.join(f'{n} {r}' for r, n in reasons.items())})" if reasons else ""
    return f"{job['rows_total']} rows: " + ", ".join(parts) + detail


def run_reconcile(args: argparse.Namespace) -> int:
    fmt = _file_format(args.file, args.format)
    data = _read_bytes(args.file)
    if args.local is not None:
        return _reconcile_local(args, data, fmt)
    with _client(args) as cb:
        try:
            job = cb.submit_reconciliation(args.collection, data, format=fmt)  # type: ignore[arg-type]
            progress = _Progress(job["rows_total"], "reconcile")
            job = cb.wait_reconciliation(
                job["id"], poll=args.poll, progress=lambda j: progress.show(j["rows_done"])
            )
            progress.end()
            text = cb.reconciliation_result(job["id"], format=args.result_format)
        except CuebankError as exc:
            raise _fail(exc) from None
    _emit(text, args.output)
    print(f"job {job['id']} {job['state']}: {_summary(job)}", file=sys.stderr)
    if job["state"] == "failed":
        raise CommandError(f"the job failed: {job.get('error')}", EXIT_SERVER)
    return EXIT_OK if job["state"] == "done" else EXIT_PARTIAL


def _reconcile_local(args: argparse.Namespace, data: bytes, fmt: str) -> int:
    # The only place the command line runs the engine itself: no server, a throwaway database.
    from service.api.parsing import parse_csv, parse_ndjson
    from service.recall.errors import ServiceError
    from service.recall.jobs import answer_fragments, parse_fragments, write_results
    from service.recall.models import CollectionSpec
    from service.recall.service import DEFAULT_TEAM, RecallService
    from service.settings import Settings
    from service.storage.db import make_engine, make_session_factory
    from service.storage.migrate import upgrade_to_head

    if args.schema is None:
        raise CommandError("--local needs --schema FILE (the collection's JSON)", EXIT_USAGE)
    spec = _read_json(args.schema)
    export = _read_bytes(args.local)
    export_fmt = _file_format(args.local, None)
    with tempfile.TemporaryDirectory(prefix="cuebank-local-") as tmp:
        settings = Settings(data_dir=Path(tmp), database_url=None, sqlite_synchronous="NORMAL")
        upgrade_to_head(settings.resolved_database_url)
        engine = make_engine(settings.resolved_database_url, sqlite_synchronous="NORMAL")
        try:
            service = RecallService(settings, make_session_factory(engine))
            name = args.collection
            try:
                service.create_collection(
                    DEFAULT_TEAM,
                    CollectionSpec(
                        name=name,
                        schema=spec["schema"],
                        rule=spec.get("rule", "dense"),
                        rule_options=spec.get("rule_options", {}),
                        verdict_options=spec.get("verdict_options", {}),
                        seed=spec.get("seed"),
                    ),
                )
                kinds = {str(f["name"]): str(f["kind"]) for f in spec["schema"]["fields"]}
                text = export.decode("utf-8-sig")
                rows = parse_csv(text, kinds) if export_fmt == "csv" else parse_ndjson(text)
                service.import_memories(DEFAULT_TEAM, name, rows)
                fragments = parse_fragments(data, fmt, kinds)
                progress = _Progress(len(fragments), "reconcile (local)")
                answered: list[tuple[int, dict[str, Any]]] = []
                for start in range(0, len(fragments), LOCAL_BATCH):
                    batch = fragments[start : start + LOCAL_BATCH]
                    records = answer_fragments(service, DEFAULT_TEAM, name, batch)
                    answered += [(f.row, r) for f, r in zip(batch, records, strict=True)]
                    progress.show(len(answered))
                progress.end()
            except ServiceError as exc:
                raise CommandError(f"{exc.detail} [{exc.slug}]", EXIT_USAGE) from None
            except (KeyError, TypeError) as exc:
                raise CommandError(
                    f"{args.schema} is not a collection file: missing {exc}", EXIT_USAGE
                ) from None
        finally:
            engine.dispose()
    _emit("".join(write_results(iter(answered), list(kinds), args.result_format)), args.output)
    counts: dict[str, int] = {}
    for _, record in answered:
        counts[record["verdict"]] = counts.get(record["verdict"], 0) + 1
    print(
        f"{len(answered)} rows: " + ", ".join(f"{n} {v}" for v, n in sorted(counts.items())),
        file=sys.stderr,
    )
    return EXIT_OK


COMMANDS: Final[dict[str, Callable[[argparse.Namespace], int]]] = {
    "collection": run_collection,
    "import": run_import,
    "recall": run_recall,
    "capacity": run_capacity,
    "export": run_export,
    "reconcile": run_reconcile,
}
