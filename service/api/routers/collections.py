"""Collections: a team's named sets of memories, each with a schema and a learning rule."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, Path, Response, status

from service.api.deps import AuditDep, CurrentTeam, RequireScope, ServiceDep
from service.api.examples import openapi_examples, response_examples
from service.api.schemas import (
    CapacityRead,
    CollectionCreate,
    CollectionPage,
    CollectionRead,
    CollectionUpdate,
    CompileRead,
)
from service.recall.models import CollectionInfo, CollectionPatch, CollectionSpec

from . import BODY_PROBLEMS, problem_responses

router = APIRouter(prefix="/v1/collections", tags=["collections"])

CollectionPath = Annotated[
    str, Path(description="The collection's name.", examples=["smp-specimens"])
]


def collection_read(info: CollectionInfo) -> CollectionRead:
    return CollectionRead(
        name=info.name,
        description=info.description,
        collection_schema=info.schema,
        rule=info.rule,
        rule_options=info.rule_options,
        verdict_options=info.verdict_options,
        seed=info.seed,
        revision=info.revision,
        n_memories=info.n_memories,
        n_units=info.n_units,
        created_at=info.created_at,
        updated_at=info.updated_at,
    )


@router.post(
    "",
    status_code=status.HTTP_201_CREATED,
    response_model=CollectionRead,
    dependencies=[RequireScope("admin")],
    responses={
        201: response_examples("CollectionRead"),
        **problem_responses(
            *BODY_PROBLEMS,
            "collection-exists",
            "invalid-schema",
            "invalid-option",
            "limit-exceeded-fields",
        ),
    },
)
def create_collection(
    body: Annotated[CollectionCreate, Body(openapi_examples=openapi_examples("CollectionCreate"))],
    service: ServiceDep,
    team: CurrentTeam,
    audit: AuditDep,
    response: Response,
) -> CollectionRead:
    """Create a collection."""
    spec = CollectionSpec(
        name=body.name,
        schema=body.collection_schema.model_dump(exclude_none=True),
        rule=body.rule,
        rule_options=dict(body.rule_options),
        verdict_options=body.verdict_options.model_dump(exclude_none=True),
        description=body.description,
        seed=body.seed,
    )
    info = service.create_collection(team, spec)
    audit.record("collection.create", collection=info.name, detail={"rule": info.rule})
    response.headers["Location"] = f"/v1/collections/{info.name}"
    return collection_read(info)


@router.get(
    "",
    response_model=CollectionPage,
    dependencies=[RequireScope("read")],
    responses={200: response_examples("CollectionPage"), **problem_responses()},
)
def list_collections(service: ServiceDep, team: CurrentTeam) -> CollectionPage:
    """List the team's collections."""
    return CollectionPage(items=[collection_read(i) for i in service.list_collections(team)])


@router.get(
    "/{name}",
    response_model=CollectionRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("CollectionRead"),
        **problem_responses("collection-not-found", "invalid-request"),
    },
)
def get_collection(name: CollectionPath, service: ServiceDep, team: CurrentTeam) -> CollectionRead:
    """Read a collection."""
    return collection_read(service.get_collection(team, name))


@router.patch(
    "/{name}",
    response_model=CollectionRead,
    dependencies=[RequireScope("admin")],
    responses={
        200: response_examples("CollectionRead"),
        **problem_responses(*BODY_PROBLEMS, "collection-not-found", "invalid-option"),
    },
)
def update_collection(
    name: CollectionPath,
    body: Annotated[CollectionUpdate, Body(openapi_examples=openapi_examples("CollectionUpdate"))],
    service: ServiceDep,
    team: CurrentTeam,
    audit: AuditDep,
) -> CollectionRead:
    """Change a collection's description, rule or verdict options."""
    patch = CollectionPatch(
        description=body.description,
        rule=body.rule,
        rule_options=dict(body.rule_options) if body.rule_options is not None else None,
        verdict_options=(
            body.verdict_options.model_dump(exclude_none=True)
            if body.verdict_options is not None
            else None
        ),
    )
    info = service.update_collection(team, name, patch)
    changed = sorted(body.model_dump(exclude_unset=True))
    audit.record("collection.update", collection=name, detail={"changed": changed})
    return collection_read(info)


@router.delete(
    "/{name}",
    status_code=status.HTTP_204_NO_CONTENT,
    response_class=Response,
    dependencies=[RequireScope("admin")],
    responses=problem_responses("collection-not-found", "invalid-request"),
)
def delete_collection(
    name: CollectionPath, service: ServiceDep, team: CurrentTeam, audit: AuditDep
) -> Response:
    """Delete a collection and all its memories."""
    service.delete_collection(team, name)
    audit.record("collection.delete", collection=name)
    return Response(status_code=status.HTTP_204_NO_CONTENT)


@router.post(
    "/{name}/compile",
    response_model=CompileRead,
    dependencies=[RequireScope("admin")],
    responses={
        200: response_examples("CompileRead"),
        **problem_responses(
            "collection-not-found", "collection-empty", "memories-dependent", "invalid-request"
        ),
    },
)
def compile_collection(
    name: CollectionPath, service: ServiceDep, team: CurrentTeam, audit: AuditDep
) -> CompileRead:
    """Compile the collection's memories into its rule's weights now."""
    info = service.compile(team, name)
    audit.record(
        "collection.compile",
        collection=name,
        detail={"revision": info.revision, "checksum": info.checksum},
    )
    return CompileRead(
        revision=info.revision,
        rule=info.rule,
        n_memories=info.n_memories,
        n_units=info.n_units,
        checksum=info.checksum,
        duration_ms=info.duration_ms,
        thresholds=info.thresholds,
        capacity=info.capacity,
        compiled_at=info.compiled_at,
    )


@router.get(
    "/{name}/capacity",
    response_model=CapacityRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("CapacityRead"),
        **problem_responses(
            "collection-not-found", "collection-empty", "memories-dependent", "invalid-request"
        ),
    },
)
def capacity(name: CollectionPath, service: ServiceDep, team: CurrentTeam) -> CapacityRead:
    """Report how close the collection is to its storage capacity."""
    info = service.capacity(team, name)
    return CapacityRead(revision=info.revision, report=info.report)
