"""Short paths for the two recall calls, the service's busiest.

Routing a request through the framework (matching every route, solving the dependency graph,
parsing the body a second time and validating it through the field machinery) costs several
times what a batched recall of one cue costs, and a good part of what the HTTP layer adds to a
batch. This middleware sits inside the body limit and the authentication, so the body is
already read, checked and parsed once (``service.api.bodies``) and the caller known, and
answers ``POST /v1/collections/{name}/recall`` and ``.../recall:batch`` itself when everything
is ordinary: a key with the read scope, a JSON body the route's own request model accepts, and
a recall that succeeds. It uses the routes' own pieces (request models, option mapping, run
queue, engine limiter, answer encoding), so its answers are the routes', byte for byte; the
tests hold the two to each other.

Anything else, and every error, goes on to the framework's route with the body replayed, which
answers it as documented (a refused cue is settled a second time there; errors are the rare
case and a recall changes nothing, so running it again is safe).
"""

from __future__ import annotations

import re
from typing import Any

import anyio.to_thread
from pydantic import BaseModel, ValidationError
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.recall.auth import Principal
from service.recall.models import RecallResult

from .bodies import JSON_DOCUMENT
from .routers.recall import answer_bytes, count_verdicts, recall, recall_batch, recall_options
from .routers.recall import router as recall_router
from .schemas import RecallBatchRequest, RecallRequest

__all__ = ["DirectRecallMiddleware"]

_PATH = re.compile(r"/v1/collections/([^/]+)/recall(:batch)?")


def _route(endpoint: Any) -> BaseRoute:
    """The route of ``endpoint``, as the router records it in the scope."""
    return next(r for r in recall_router.routes if getattr(r, "endpoint", None) is endpoint)


_SINGLE, _BATCH = _route(recall), _route(recall_batch)


def _json_body(scope: Scope) -> bool:
    for key, value in scope.get("headers", ()):
        if key == b"content-type":
            media = value.split(b";", 1)[0].strip().lower()
            return bool(media == b"application/json")
    return False


class DirectRecallMiddleware:
    """Answers ordinary recalls without the framework's routing (see the module).

    Parameters
    ----------
    app : ASGI app
        The framework's app, which answers everything this middleware does not.
    enabled : bool
        False passes every request on (the tests compare the two paths).

    Attributes
    ----------
    answered : int
        Recalls answered here, for the tests and the bench.
    """

    def __init__(self, app: ASGIApp, *, enabled: bool = True) -> None:
        self.app = app
        self.enabled = enabled
        self.answered = 0

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if not (
            self.enabled
            and scope["type"] == "http"
            and scope["method"] == "POST"
            and not scope.get("root_path")
            and "/recall" in scope["path"]
        ):
            await self.app(scope, receive, send)
            return
        match = _PATH.fullmatch(scope["path"])
        state = scope.get("state", {})
        principal = state.get("principal")
        document = state.get(JSON_DOCUMENT)
        if (
            match is None
            or not isinstance(principal, Principal)
            or not principal.allows("read")
            or not isinstance(document, dict)
            or not _json_body(scope)
        ):
            await self.app(scope, receive, send)
            return
        message = await receive()
        if message["type"] != "http.request" or message.get("more_body", False):
            await self.app(scope, _replay(message, receive), send)
            return
        name, batch = match.group(1), match.group(2) is not None
        try:
            if batch:
                answer = await self._batch(scope, name, principal.team, document)
            else:
                answer = await self._single(scope, name, principal.team, document)
        except Exception:
            answer = None
        if answer is None:
            await self.app(scope, _replay(message, receive), send)
            return
        scope["route"] = _BATCH if batch else _SINGLE  # for the access log and the metrics
        await send(
            {
                "type": "http.response.start",
                "status": 200,
                "headers": [
                    (b"content-length", str(len(answer)).encode("latin-1")),
                    (b"content-type", b"application/json"),
                ],
            }
        )
        await send({"type": "http.response.body", "body": answer})
        self.answered += 1

    async def _single(
        self, scope: Scope, name: str, team: str, document: dict[str, Any]
    ) -> bytes | None:
        request = _valid(RecallRequest, document)
        if not isinstance(request, RecallRequest):
            return None
        state = scope["app"].state
        result = await state.recall_queue.submit(
            (team, name, recall_options(request.options)), dict(request.cue)
        )
        count_verdicts(state.metrics, [result])
        return answer_bytes(result)

    async def _batch(
        self, scope: Scope, name: str, team: str, document: dict[str, Any]
    ) -> bytes | None:
        request = _valid(RecallBatchRequest, document)
        if not isinstance(request, RecallBatchRequest):
            return None
        state = scope["app"].state
        service, heap = state.service, state.heap
        cues = [dict(c) for c in request.cues]
        options = recall_options(request.options)

        def run() -> list[RecallResult]:
            answers: list[RecallResult] = service.recall(team, name, cues, options)
            heap.after_run()
            return answers

        results = await anyio.to_thread.run_sync(run, limiter=state.engine_limiter)
        count_verdicts(state.metrics, results)
        return answer_bytes({"results": results})


def _valid(model: type[BaseModel], document: dict[str, Any]) -> BaseModel | None:
    try:
        return model.model_validate(document)
    except (ValidationError, TypeError, ValueError):
        return None


def _replay(first: Message, receive: Receive) -> Receive:
    """``receive`` with ``first`` given back once more, for the route to read the body."""
    given = False

    async def again() -> Message:
        nonlocal given
        if not given:
            given = True
            return first
        return await receive()

    return again
