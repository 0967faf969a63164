"""Memories: the stored records of a collection, addressed by key, and their bulk import."""

from __future__ import annotations

import re
from typing import Annotated

from fastapi import APIRouter, Body, Path, Query, Request, Response, status
from starlette.concurrency import run_in_threadpool

from service.api.bodies import check_lines, check_utf8, read_capped
from service.api.deps import AuditDep, CurrentTeam, RequireScope, ServiceDep, SettingsDep
from service.api.errors import UnsupportedMediaType
from service.api.examples import openapi_examples, response_examples
from service.api.parsing import ImportRow, parse_csv, parse_ndjson
from service.api.schemas import (
    ImportRead,
    MemoryCreate,
    MemoryPage,
    MemoryPutRead,
    MemoryRead,
    RowErrorRead,
)
from service.recall.models import MemoryInfo

from . import BODY_PROBLEMS, problem_responses
from .collections import CollectionPath

router = APIRouter(prefix="/v1/collections/{name}", tags=["memories"])

IMPORT_SUFFIX = "/imports"
#: The import route's path, whose body the route streams itself.
IMPORT_PATH = re.compile(r"/v1/collections/[^/]+/imports")
NDJSON_TYPES = ("application/x-ndjson", "application/ndjson", "application/jsonl")
CSV_TYPES = ("text/csv",)
REVISION_HEADER = "Cuebank-Revision"

KeyPath = Annotated[
    str, Path(description="The memory's key, unique in its collection.", examples=["SMP-0001"])
]


def memory_read(info: MemoryInfo) -> MemoryRead:
    return MemoryRead(
        key=info.key, fields=info.fields, created_at=info.created_at, updated_at=info.updated_at
    )


@router.put(
    "/memories/{key:path}",
    response_model=MemoryPutRead,
    dependencies=[RequireScope("write")],
    responses={
        200: {
            "description": "The memory was replaced.",
            **response_examples("MemoryPutRead", "replaced"),
        },
        201: {
            "description": "The memory was created.",
            "model": MemoryPutRead,
            **response_examples("MemoryPutRead", "created"),
        },
        **problem_responses(
            *BODY_PROBLEMS, "collection-not-found", "invalid-record", "limit-exceeded-memories"
        ),
    },
)
def put_memory(
    name: CollectionPath,
    key: KeyPath,
    body: Annotated[MemoryCreate, Body(openapi_examples=openapi_examples("MemoryCreate"))],
    service: ServiceDep,
    team: CurrentTeam,
    audit: AuditDep,
    response: Response,
) -> MemoryPutRead:
    """Create or replace a memory."""
    result = service.put_memory(team, name, key, dict(body.fields))
    audit.record("memory.put", collection=name, memory_key=key, detail={"created": result.created})
    response.status_code = status.HTTP_201_CREATED if result.created else status.HTTP_200_OK
    response.headers[REVISION_HEADER] = str(result.revision)
    mem = result.memory
    return MemoryPutRead(
        key=mem.key,
        fields=mem.fields,
        created_at=mem.created_at,
        updated_at=mem.updated_at,
        created=result.created,
        revision=result.revision,
    )


@router.get(
    "/memories/{key:path}",
    response_model=MemoryRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("MemoryRead"),
        **problem_responses("collection-not-found", "memory-not-found", "invalid-request"),
    },
)
def get_memory(
    name: CollectionPath, key: KeyPath, service: ServiceDep, team: CurrentTeam
) -> MemoryRead:
    """Read a memory."""
    return memory_read(service.get_memory(team, name, key))


@router.delete(
    "/memories/{key:path}",
    status_code=status.HTTP_204_NO_CONTENT,
    response_class=Response,
    dependencies=[RequireScope("write")],
    responses=problem_responses("collection-not-found", "memory-not-found", "invalid-request"),
)
def delete_memory(
    name: CollectionPath, key: KeyPath, service: ServiceDep, team: CurrentTeam, audit: AuditDep
) -> Response:
    """Delete a memory."""
    revision = service.delete_memory(team, name, key)
    audit.record("memory.delete", collection=name, memory_key=key)
    return Response(
        status_code=status.HTTP_204_NO_CONTENT, headers={REVISION_HEADER: str(revision)}
    )


@router.get(
    "/memories",
    response_model=MemoryPage,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("MemoryPage"),
        **problem_responses(
            "collection-not-found", "invalid-request", "invalid-cursor", "limit-exceeded-page"
        ),
    },
)
def list_memories(
    name: CollectionPath,
    service: ServiceDep,
    team: CurrentTeam,
    cursor: Annotated[
        str | None, Query(description="The next_cursor of the previous page.")
    ] = None,
    limit: Annotated[int | None, Query(ge=1, description="Page size.")] = None,
) -> MemoryPage:
    """List memories, a page at a time in key order."""
    page = service.list_memories(team, name, cursor, limit)
    return MemoryPage(items=[memory_read(m) for m in page.items], next_cursor=page.next_cursor)


_IMPORT_BODY = {
    "required": True,
    "content": {
        "application/x-ndjson": {
            "schema": {"type": "string"},
            "example": (
                '{"key": "SMP-0101", "fields": {"taxon": "Littorina littorea", '
                '"collector": "Maren Holt", "site_code": "SMP-N3", '
                '"collected_on": "2024-09-03", "depth_m": 0.8}}\n'
            ),
        },
        "text/csv": {
            "schema": {"type": "string"},
            "example": (
                "key,taxon,collector,site_code,collected_on,depth_m\n"
                "SMP-0101,Littorina littorea,Maren Holt,SMP-N3,2024-09-03,0.8\n"
            ),
        },
    },
}


@router.post(
    IMPORT_SUFFIX,
    response_model=ImportRead,
    dependencies=[RequireScope("write")],
    openapi_extra={"requestBody": _IMPORT_BODY},
    responses={
        200: response_examples("ImportRead"),
        **problem_responses(
            "malformed-body",
            "body-too-large-bulk",
            "unsupported-media-type",
            "collection-not-found",
            "import-rejected",
            "import-missing-column",
            "limit-exceeded-memories",
        ),
    },
)
async def import_memories(
    name: CollectionPath,
    request: Request,
    service: ServiceDep,
    settings: SettingsDep,
    team: CurrentTeam,
    audit: AuditDep,
    skip_bad: Annotated[
        bool, Query(description="Store the good rows and report the bad ones.")
    ] = False,
) -> ImportRead:
    """Import memories from NDJSON or CSV, all or nothing unless skip_bad is set."""
    media = request.headers.get("content-type", "").split(";", 1)[0].strip().lower()
    if media not in NDJSON_TYPES + CSV_TYPES:
        raise UnsupportedMediaType(
            f"an import is sent as {NDJSON_TYPES[0]} or {CSV_TYPES[0]}, not {media or 'nothing'!r}"
        )
    # The collection is looked up first so a wrong name is a 404 before a large upload is read.
    info = await run_in_threadpool(service.get_collection, team, name)
    raw = await read_capped(request.stream(), settings.max_bulk_body_bytes, "max_bulk_body_bytes")
    check_utf8(raw)
    check_lines(raw, settings.max_import_line_bytes)
    text = raw.decode("utf-8").removeprefix("\ufeff")
    rows: list[ImportRow]
    if media in CSV_TYPES:
        kinds = {str(f["name"]): str(f["kind"]) for f in info.schema["fields"]}
        rows = list(parse_csv(text, kinds, max_columns=settings.max_fields + 1))
    else:
        rows = list(parse_ndjson(text))
    report = await run_in_threadpool(
        lambda: service.import_memories(team, name, rows, skip_bad=skip_bad)
    )
    await audit.arecord(
        "memory.import",
        collection=name,
        detail={"written": report.written, "skipped": report.skipped, "format": media},
    )
    return ImportRead(
        received=report.received,
        written=report.written,
        created=report.created,
        replaced=report.replaced,
        skipped=report.skipped,
        errors=[
            RowErrorRead(row=e.row, key=e.key, field=e.field, reason=e.reason)
            for e in report.errors
        ],
        revision=report.revision,
    )
