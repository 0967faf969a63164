"""Short paths for the two recall calls, the service's busiest.

Routing a request through the framework (matching every route, solving the dependency graph,
parsing the body a second time and validating it through the field machinery) costs several
times what a batched recall of one cue costs, and a good part of what the HTTP layer adds to a
batch. This middleware sits inside the body limit and the authentication, so the body is
already read, checked and parsed once (``service.api.bodies``) and the caller known, and
answers ``POST /v1/collections/{name}/recall`` and ``.../recall:batch`` itself when everything
is ordinary: a key with the read scope, a JSON body the route's own request model accepts, and
a recall that succeeds. It calls what the routes call (their request models, then
``recall_one``, and for a batch ``recall_many_shared``, which settles concurrent batches
together where the route settles each alone; a cue's answer does not depend on the cues that
share its run), so its answers are the routes', byte for byte; the tests hold the two to each
other.

Anything else, and every error, goes on to the framework's route with the body replayed, which
answers it as documented (a refused cue is settled a second time there; errors are the rare
case and a recall changes nothing, so running it again is safe).
"""

from __future__ import annotations

import re
from typing import Any

from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.recall.auth import Principal

from .bodies import JSON_DOCUMENT
from .routers.recall import recall, recall_batch, recall_many_shared, recall_one
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
        checked = scope.get("state", {})  # what the key check and the body limit left
        principal = checked.get("principal")
        document = checked.get(JSON_DOCUMENT)
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
        app_state, team = scope["app"].state, principal.team
        answer: bytes | None
        try:
            if batch:
                many = RecallBatchRequest.model_validate(document)
                answer = await recall_many_shared(app_state, team, name, many)
            else:
                single = RecallRequest.model_validate(document)
                answer = await recall_one(app_state, team, name, single)
        except Exception:  # a refusal of any kind: the route answers it as documented
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
