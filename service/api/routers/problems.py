"""Problem types: every ``type`` URI in an error answer resolves here to a description."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path

from service.api.errors import RouteNotFound, all_problem_types
from service.api.examples import response_examples
from service.api.schemas import ProblemTypeRead
from service.recall.errors import problem_type_uri

from . import problem_responses

router = APIRouter(prefix="/problems", tags=["problems"])

DESCRIPTIONS: dict[str, str] = {
    "unauthenticated": "The call needs an API key, sent as 'Authorization: Bearer <key>', and "
    "none was sent, or the key is malformed, unknown, revoked or expired. The "
    "WWW-Authenticate header names the scheme.",
    "forbidden": "The key is valid but lacks the scope this call needs; `scope` names it. "
    "read: recall, list and read; write: memories and imports; admin: collections, compile, "
    "keys and the audit log.",
    "rate-limited": "Too many requests: the key is over its rate (`limit` rate_per_second), or "
    "this address failed to authenticate too often (`limit` auth_failures_per_minute). The "
    "Retry-After header and `retry_after` give the seconds to wait.",
    "key-not-found": "The team has no key with this prefix.",
    "team-not-found": "There is no team by this name.",
    "team-exists": "A team by this name already exists.",
    "internal": "The service met an error it did not expect. It has been logged; the answer "
    "holds no details. Retrying may help; if it persists, report the time and path.",
    "not-found": "Nothing exists at this path, or the method and path name no resource.",
    "collection-not-found": "The team has no collection by this name.",
    "memory-not-found": "The collection holds no memory with this key.",
    "conflict": "The request conflicts with the current state of the resource.",
    "collection-exists": "The team already has a collection by this name; pick another name or "
    "change the existing one with PATCH.",
    "collection-empty": "The collection holds no memories, so there is nothing to compile or "
    "recall yet; store memories first.",
    "memories-dependent": "The collection's rule cannot store these memories together "
    "(duplicates or linearly dependent records); `keys` lists them. Delete one, or switch to "
    "the dense rule.",
    "invalid-input": "The request is well formed, but a value in it is not acceptable.",
    "invalid-schema": "The collection schema is not valid; `field` names the field at fault.",
    "invalid-record": "A memory's fields do not fit the collection's schema; `field` names the "
    "field at fault.",
    "invalid-cue": "A cue does not fit the collection's schema (an unknown field, a value of the "
    "wrong kind, a number out of range); `field` names it and `cue` its position in a batch.",
    "invalid-option": "An option has a value the service does not accept; `field` names it.",
    "invalid-cursor": "The cursor is not one this service issued; start again without one.",
    "import-rejected": "Some rows of a bulk import are bad, so nothing was written; `errors` "
    "lists each bad row with its number, key, field and reason. Fix them, or send "
    "skip_bad=true to store the good rows.",
    "limit-exceeded": "A hard limit was exceeded: `limit` names it, `value` is what was asked "
    "for and `maximum` what is allowed. Bodies over the size limit answer 413.",
    "unavailable": "The service cannot answer now: the database is unreachable or not migrated "
    "to the newest schema (run `cuebank migrate`).",
    "malformed-json": "The request body is not valid JSON; the detail gives the position.",
    "malformed-body": "The request body cannot be read, for instance it is not UTF-8.",
    "method-not-allowed": "The path exists but not with this method; the Allow header lists "
    "the methods it takes.",
    "unsupported-media-type": "The body is sent with a media type this route does not take.",
    "job-not-found": "The team has no reconciliation job with this id.",
    "job-finished": "The reconciliation job has ended (done, failed or cancelled), so it cannot "
    "be cancelled; its result stays readable.",
    "fragments-rejected": "The fragments file cannot be used as a whole (not UTF-8, or its "
    "header names a column that is neither 'ref', 'row_id' nor a field); no job was created.",
    "invalid-request": "The request does not match the API's shape: `errors` lists each "
    "failing field with the reason (a missing member, an unknown one, a wrong type, a value "
    "out of bounds).",
}


@router.get(
    "/{slug}",
    response_model=ProblemTypeRead,
    responses={
        200: response_examples("ProblemTypeRead"),
        **problem_responses("not-found", "invalid-request"),
    },
)
async def describe_problem(
    slug: Annotated[str, Path(examples=["collection-not-found"])],
) -> ProblemTypeRead:
    """Describe a problem type."""
    known = all_problem_types()
    if slug not in known:
        raise RouteNotFound(f"there is no problem type {slug!r}")
    title, status = known[slug]
    return ProblemTypeRead(
        type=problem_type_uri(slug),
        title=title,
        status=status,
        description=DESCRIPTIONS.get(slug, title),
    )
