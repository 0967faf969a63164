"""Recall: complete a fragment into the stored memory it belongs to, with a verdict."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, Request

from service.api.deps import CurrentTeam, RequireScope, ServiceDep
from service.api.examples import openapi_examples, response_examples
from service.api.schemas import (
    DecodedFieldRead,
    NeighbourRead,
    RecallBatchRead,
    RecallBatchRequest,
    RecalledMemoryRead,
    RecallOptionsSpec,
    RecallRead,
    RecallRequest,
)
from service.recall.models import RecallOptions, RecallResult

from . import BODY_PROBLEMS, problem_responses
from .collections import CollectionPath

router = APIRouter(prefix="/v1/collections/{name}", tags=["recall"])

RECALL_PROBLEMS = (
    *BODY_PROBLEMS,
    "collection-not-found",
    "collection-empty",
    "invalid-cue",
    "limit-exceeded-steps",
    "memories-dependent",
)


def _options(spec: RecallOptionsSpec) -> RecallOptions:
    return RecallOptions(
        mode=spec.mode,
        clamp=spec.clamp,
        max_steps=spec.max_steps,
        top_k=spec.top_k,
        include_energy=spec.include_energy,
    )


def recall_read(result: RecallResult) -> RecallRead:
    return RecallRead(
        verdict=result.verdict,
        reason=result.reason,
        memory=(
            RecalledMemoryRead(key=result.memory.key, fields=result.memory.fields)
            if result.memory is not None
            else None
        ),
        best_key=result.best_key,
        overlap=result.overlap,
        margin=result.margin,
        cue_overlap=result.cue_overlap,
        cue_margin=result.cue_margin,
        cue_agreement=result.cue_agreement,
        field_agreement=result.field_agreement,
        fields={
            name: DecodedFieldRead(value=f.value, score=f.score, z=f.z)
            for name, f in result.fields.items()
        },
        nearest=[NeighbourRead(key=n.key, overlap=n.overlap) for n in result.nearest],
        steps=result.steps,
        converged=result.converged,
        cycle_length=result.cycle_length,
        revision=result.revision,
        energy=result.energy,
    )


def _count(request: Request, results: list[RecallResult]) -> None:
    verdicts = request.app.state.metrics.verdicts
    for r in results:
        verdicts.labels(r.verdict, r.reason).inc()


@router.post(
    "/recall",
    response_model=RecallRead,
    dependencies=[RequireScope("read")],
    responses={200: response_examples("RecallRead"), **problem_responses(*RECALL_PROBLEMS)},
)
def recall(
    request: Request,
    name: CollectionPath,
    body: Annotated[RecallRequest, Body(openapi_examples=openapi_examples("RecallRequest"))],
    service: ServiceDep,
    team: CurrentTeam,
) -> RecallRead:
    """Recall the memory a cue belongs to."""
    [result] = service.recall(team, name, [dict(body.cue)], _options(body.options))
    _count(request, [result])
    return recall_read(result)


@router.post(
    "/recall:batch",
    response_model=RecallBatchRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("RecallBatchRead"),
        **problem_responses(*RECALL_PROBLEMS, "limit-exceeded-batch"),
    },
)
def recall_batch(
    request: Request,
    name: CollectionPath,
    body: Annotated[
        RecallBatchRequest, Body(openapi_examples=openapi_examples("RecallBatchRequest"))
    ],
    service: ServiceDep,
    team: CurrentTeam,
) -> RecallBatchRead:
    """Recall several cues at once; results come in the order of the cues."""
    results = service.recall(team, name, [dict(c) for c in body.cues], _options(body.options))
    _count(request, results)
    return RecallBatchRead(results=[recall_read(r) for r in results])
