"""A short path for the single-cue recall, the service's busiest call.

Routing a request through the framework (matching every route, solving the dependency graph,
validating and serialising through the models) costs several times what the recall itself
costs once the engine batches concurrent cues. This middleware sits inside the body limit and
the authentication, so the body is already read and checked and the caller known, and answers
``POST /v1/collections/{name}/recall`` itself when everything is ordinary: a key with the read
scope, a JSON body that the route's own request model accepts, and a recall that succeeds. It
uses the route's own pieces (request model, option mapping, run queue, response document), so
its answers are the route's, byte for byte; the tests hold the two to each other.

Anything else, and every error, goes on to the framework's route with the body replayed, which
answers it as documented (a refused cue is settled a second time there; errors are the rare
case and a recall changes nothing, so running it again is safe).
"""

from __future__ import annotations

import re

import orjson
from pydantic import ValidationError
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.recall.auth import Principal

from .routers.recall import answer_bytes, count_verdicts, recall, recall_options
from .routers.recall import router as recall_router
from .schemas import RecallRequest

__all__ = ["DirectRecallMiddleware"]

_PATH = re.compile(r"/v1/collections/([^/]+)/recall")
#: The route answered here, as the router would record it in the scope.
_ROUTE: BaseRoute = next(r for r in recall_router.routes if getattr(r, "endpoint", None) is recall)


def _json_body(scope: Scope) -> bool:
    for key, value in scope.get("headers", ()):
        if key == b"content-type":
            media = value.split(b";", 1)[0].strip().lower()
            return bool(media == b"application/json")
    return False


class DirectRecallMiddleware:
    """Answers ordinary single-cue recalls without the framework's routing (see the module).

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
            and scope["path"].endswith("/recall")
        ):
            await self.app(scope, receive, send)
            return
        match = _PATH.fullmatch(scope["path"])
        principal = scope.get("state", {}).get("principal")
        if (
            match is None
            or not isinstance(principal, Principal)
            or not principal.allows("read")
            or not _json_body(scope)
        ):
            await self.app(scope, receive, send)
            return
        message = await receive()
        body: bytes = message.get("body", b"")
        if message["type"] != "http.request" or message.get("more_body", False):
            await self.app(scope, _replay(message, receive), send)
            return
        answer = await self._answer(scope, match.group(1), principal.team, body)
        if answer is None:
            await self.app(scope, _replay(message, receive), send)
            return
        scope["route"] = _ROUTE  # for the access log and the metrics, as the router sets it
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

    async def _answer(self, scope: Scope, name: str, team: str, body: bytes) -> bytes | None:
        """The route's 200 body, or None where the route must answer (any error)."""
        try:
            request = RecallRequest.model_validate(orjson.loads(body))
        except (orjson.JSONDecodeError, ValidationError, TypeError, ValueError):
            return None
        state = scope["app"].state
        try:
            result = await state.recall_queue.submit(
                (team, name, recall_options(request.options)), dict(request.cue)
            )
        except Exception:
            return None
        count_verdicts(state.metrics, [result])
        return answer_bytes(result)


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
