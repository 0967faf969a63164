"""Reconciliation jobs: a file of fragments recalled in the background, with progress.

The upload is checked and counted at once (202 and a job); a worker thread answers it batch by
batch. Progress, verdict counts and the closest calls are read from the job; the per-row
answers, in input order, from its result, as CSV or NDJSON.
"""

from __future__ import annotations

import re
from typing import Annotated, Literal

from fastapi import APIRouter, Depends, Path, Query, Request, Response, status
from fastapi.responses import StreamingResponse
from starlette.concurrency import run_in_threadpool

from service.api.bodies import read_capped
from service.api.deps import AuditDep, CurrentTeam, RequireScope, SettingsDep
from service.api.errors import UnsupportedMediaType
from service.api.examples import response_examples
from service.api.schemas import ReconciliationRead, ReviewRowRead
from service.recall.jobs import JobInfo, ReconciliationService, write_results

from . import problem_responses
from .collections import CollectionPath
from .memories import CSV_TYPES, NDJSON_TYPES

router = APIRouter(tags=["reconciliations"])

#: The upload route's path, whose body the route streams itself (up to the bulk limit).
SUBMIT_PATH = re.compile(r"/v1/collections/[^/]+/reconciliations")
JOB_STATE_HEADER = "Cuebank-Job-State"
RESULT_MEDIA = {"csv": "text/csv; charset=utf-8", "ndjson": "application/x-ndjson"}

JobPath = Annotated[
    str,
    Path(
        description="The job id returned when the file was uploaded.",
        examples=["1b4e28ba-2fa1-11d2-883f-0016d3cca427"],
    ),
]


async def get_jobs(request: Request) -> ReconciliationService:
    jobs: ReconciliationService = request.app.state.jobs
    return jobs


JobsDep = Annotated[ReconciliationService, Depends(get_jobs)]


def job_read(info: JobInfo) -> ReconciliationRead:
    counts = {k: int(v) for k, v in info.counts.items() if k != "reasons"}
    return ReconciliationRead(
        id=info.id,
        collection=info.collection,
        state=info.state,
        format=info.format,
        rows_total=info.rows_total,
        rows_done=info.rows_done,
        rate=info.rate,
        eta_seconds=info.eta_seconds,
        counts=counts,
        reasons=dict(info.counts.get("reasons", {})),
        error=info.error,
        attempts=info.attempts,
        created_at=info.created_at,
        updated_at=info.updated_at,
        started_at=info.started_at,
        finished_at=info.finished_at,
        review=[ReviewRowRead.model_validate(r) for r in info.review],
        result_url=f"/v1/reconciliations/{info.id}/result",
    )


_SUBMIT_BODY = {
    "required": True,
    "content": {
        "text/csv": {
            "schema": {"type": "string"},
            "example": (
                "ref,taxon,collector,site_code,collected_on,depth_m\n"
                "LBL-0001,Thalora marensis,,SMP-M1,,1.4\n"
                'LBL-0002,"Vessina, spinata",Maren Saltcombe,,2021-05-04,\n'
            ),
        },
        "application/x-ndjson": {
            "schema": {"type": "string"},
            "example": '{"ref": "LBL-0001", "taxon": "Thalora marensis", "depth_m": 1.4}\n',
        },
    },
}


@router.post(
    "/v1/collections/{name}/reconciliations",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=ReconciliationRead,
    dependencies=[RequireScope("write")],
    openapi_extra={"requestBody": _SUBMIT_BODY},
    responses={
        202: response_examples("ReconciliationRead"),
        **problem_responses(
            "malformed-body",
            "body-too-large-bulk",
            "unsupported-media-type",
            "collection-not-found",
            "fragments-rejected",
        ),
    },
)
async def submit_reconciliation(
    name: CollectionPath,
    request: Request,
    jobs: JobsDep,
    settings: SettingsDep,
    team: CurrentTeam,
    audit: AuditDep,
    response: Response,
) -> ReconciliationRead:
    """Upload a CSV or NDJSON file of fragments and start recalling them in the background."""
    media = request.headers.get("content-type", "").split(";", 1)[0].strip().lower()
    if media not in NDJSON_TYPES + CSV_TYPES:
        raise UnsupportedMediaType(
            f"fragments are sent as {CSV_TYPES[0]} or {NDJSON_TYPES[0]}, not {media or 'nothing'!r}"
        )
    # A wrong collection name is a 404 before a large upload is read.
    await run_in_threadpool(jobs.service.get_collection, team, name)
    raw = await read_capped(request.stream(), settings.max_bulk_body_bytes, "max_bulk_body_bytes")
    fmt = "csv" if media in CSV_TYPES else "ndjson"
    info = await run_in_threadpool(jobs.submit, team, name, raw, fmt)
    await audit.arecord(
        "reconciliation.submit",
        collection=name,
        detail={"job": info.id, "rows": info.rows_total, "format": fmt},
    )
    response.headers["Location"] = f"/v1/reconciliations/{info.id}"
    return job_read(info)


@router.get(
    "/v1/reconciliations/{job_id}",
    response_model=ReconciliationRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("ReconciliationRead"),
        **problem_responses("job-not-found", "invalid-request"),
    },
)
def get_reconciliation(job_id: JobPath, jobs: JobsDep, team: CurrentTeam) -> ReconciliationRead:
    """Read a job's progress, verdict counts and the rows most worth a human look."""
    return job_read(jobs.get(team, job_id))


@router.get(
    "/v1/reconciliations/{job_id}/result",
    response_class=StreamingResponse,
    dependencies=[RequireScope("read")],
    responses={
        200: {
            "description": "One row per answered fragment, in input order.",
            "content": {
                "text/csv": {
                    "schema": {"type": "string"},
                    "example": (
                        "row,ref,matched_key,verdict,reason,overlap,margin,cue_margin,"
                        "depth_m,depth_m_score\r\n"
                        "1,LBL-0001,SMP-2021-00107,recalled,clean,0.98,0.71,0.33,1.5,0.94\r\n"
                    ),
                },
                "application/x-ndjson": {"schema": {"type": "string"}},
            },
        },
        **problem_responses("job-not-found", "invalid-request"),
    },
)
def reconciliation_result(
    job_id: JobPath,
    jobs: JobsDep,
    team: CurrentTeam,
    format: Annotated[
        Literal["csv", "ndjson"], Query(description="csv (with a header row) or ndjson.")
    ] = "csv",
) -> StreamingResponse:
    """Read the answered rows so far, in input order; complete once the job is done."""
    info, rows = jobs.results(team, job_id)
    return StreamingResponse(
        write_results(rows, info.field_names, format),
        media_type=RESULT_MEDIA[format],
        headers={JOB_STATE_HEADER: info.state},
    )


@router.delete(
    "/v1/reconciliations/{job_id}",
    response_model=ReconciliationRead,
    dependencies=[RequireScope("write")],
    responses={
        200: response_examples("ReconciliationRead"),
        **problem_responses("job-not-found", "job-finished", "invalid-request"),
    },
)
def cancel_reconciliation(job_id: JobPath, jobs: JobsDep, team: CurrentTeam) -> ReconciliationRead:
    """Cancel a queued or running job; the rows answered so far stay readable."""
    return job_read(jobs.cancel(team, job_id))
