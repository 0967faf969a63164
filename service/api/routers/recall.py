"""Recall: complete a fragment into the stored memory it belongs to, with a verdict."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Sequence
from typing import Annotated, Any, Final

import orjson
from fastapi import APIRouter, Body, Request, Response

from service.api.batching import RecallQueue
from service.api.deps import CurrentTeam, RequireScope
from service.api.examples import openapi_examples, response_examples
from service.api.heap import HeapFreezer
from service.api.schemas import (
    RecallBatchRead,
    RecallBatchRequest,
    RecallOptionsSpec,
    RecallRead,
    RecallRequest,
)
from service.recall.errors import ServiceError
from service.recall.models import RecallOptions, RecallResult
from service.recall.service import RUN_CUES, RecallService

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


#: What cues must share to be settled together: team, collection and options.
RecallKey = tuple[str, str, RecallOptions]

#: The most cues of concurrent batch requests settled in one engine call (the engine still
#: settles them in runs of ``RUN_CUES``); a larger request goes alone.
SHARED_BATCH_CUES: Final = 4 * RUN_CUES


def recall_options(spec: RecallOptionsSpec) -> RecallOptions:
    """The engine's options for the request's."""
    return RecallOptions(
        mode=spec.mode,
        clamp=spec.clamp,
        max_steps=spec.max_steps,
        top_k=spec.top_k,
        include_energy=spec.include_energy,
    )


def answer_bytes(document: Any) -> bytes:
    """``document`` as the JSON body of an answer.

    A :class:`RecallResult` is written as it is: orjson writes a dataclass field by field, in
    order, and the result's fields (and its memory's, fields' and neighbours') carry exactly
    the names and order of :class:`RecallRead`, so no dictionary is built per answer, which
    cost three times the encoding for a large batch. The tests read every answer back
    through the response models unchanged.
    """
    return orjson.dumps(document, option=orjson.OPT_SERIALIZE_NUMPY)


def count_verdicts(metrics: Any, results: list[RecallResult]) -> None:
    """Add ``results`` to the verdict counters of the app's ``metrics``."""
    for (verdict, reason), n in Counter((r.verdict, r.reason) for r in results).items():
        metrics.count_verdict(verdict, reason, n)


async def recall_one(state: Any, team: str, name: str, body: RecallRequest) -> bytes:
    """The answer body of one single-cue recall, through the app's run queue; a refusal
    raises. Shared by the route and the short path of :mod:`service.api.direct`."""
    queue: RecallQueue[RecallKey, bytes] = state.recall_queue
    return await queue.submit((team, name, recall_options(body.options)), dict(body.cue))


async def recall_many(state: Any, team: str, name: str, body: RecallBatchRequest) -> bytes:
    """The answer body of one batch recall, on the app's engine threads; a refusal raises.
    Shared by the route and the short path of :mod:`service.api.direct`."""
    service: RecallService = state.service
    heap: HeapFreezer = state.heap
    cues = [dict(c) for c in body.cues]
    options = recall_options(body.options)

    def run() -> bytes:
        # written here, beside the results: the event loop has other requests to read
        answers = service.recall(team, name, cues, options)
        heap.after_run()
        count_verdicts(state.metrics, answers)
        return answer_bytes({"results": answers})

    answer: bytes = await state.engine_threads.run(run)
    return answer


async def recall_many_shared(state: Any, team: str, name: str, body: RecallBatchRequest) -> bytes:
    """:func:`recall_many` for the short path: concurrent batch requests on the same
    collection with the same options are settled in one engine call, up to
    :data:`SHARED_BATCH_CUES` cues (see :func:`shared_batches`); any refusal raises, and the
    route answers it."""
    queue: RecallQueue[RecallKey, bytes] = state.batch_queue
    cues = [dict(c) for c in body.cues]
    state.service.check_batch(cues)  # what recall checks first, before the run is shared
    return await queue.submit((team, name, recall_options(body.options)), cues)


def shared_batches(
    service: RecallService, heap: HeapFreezer, state: Any
) -> Callable[[RecallKey, Sequence[list[dict[str, Any]]]], list[bytes | ServiceError]]:
    """The run of :func:`recall_many_shared`'s queue: the batches' cues settled together,
    each batch's answer written on its own.

    Under load a worker's engine thread then switches to its event loop once per several
    requests rather than once per request; each switch costs both sides their warm caches
    (measured with ``cuebank bench``: 128 and 256 cues per request cost 12% and 18% less CPU
    per cue in the server than 64, while in-process the cost per cue is the same at all
    three). A cue's answer does not depend on the cues that share its run (see the README).
    A batch with a refused cue gets that refusal, and the route then answers it with the
    request's own numbering; the others are answered.
    """

    def run(key: RecallKey, batches: Sequence[list[dict[str, Any]]]) -> list[bytes | ServiceError]:
        cues = [cue for batch in batches for cue in batch]
        answers = service.recall_each(key[0], key[1], cues, key[2])
        heap.after_run()
        out: list[bytes | ServiceError] = []
        start = 0
        for batch in batches:
            part = answers[start : start + len(batch)]
            start += len(batch)
            refused = next((a for a in part if isinstance(a, ServiceError)), None)
            if refused is not None:
                out.append(refused)
                continue
            results = [a for a in part if isinstance(a, RecallResult)]
            count_verdicts(state.metrics, results)
            out.append(answer_bytes({"results": results}))
        return out

    return run


def _json(body: bytes) -> Response:
    return Response(body, media_type="application/json")


@router.post(
    "/recall",
    response_model=RecallRead,
    dependencies=[RequireScope("read")],
    responses={200: response_examples("RecallRead"), **problem_responses(*RECALL_PROBLEMS)},
)
async def recall(
    request: Request,
    name: CollectionPath,
    body: Annotated[RecallRequest, Body(openapi_examples=openapi_examples("RecallRequest"))],
    team: CurrentTeam,
) -> Response:
    """Recall the memory a cue belongs to.

    Concurrent recalls on the same collection with the same options are settled together in
    one matrix product; each is answered as if it came alone.
    """
    return _json(await recall_one(request.app.state, team, name, body))


@router.post(
    "/recall:batch",
    response_model=RecallBatchRead,
    dependencies=[RequireScope("read")],
    responses={
        200: response_examples("RecallBatchRead"),
        **problem_responses(*RECALL_PROBLEMS, "limit-exceeded-batch"),
    },
)
async def recall_batch(
    request: Request,
    name: CollectionPath,
    body: Annotated[
        RecallBatchRequest, Body(openapi_examples=openapi_examples("RecallBatchRequest"))
    ],
    team: CurrentTeam,
) -> Response:
    """Recall several cues at once; results come in the order of the cues."""
    return _json(await recall_many(request.app.state, team, name, body))
