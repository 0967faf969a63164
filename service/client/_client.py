"""Sync and async clients of the Cuebank HTTP API, on httpx.

Every method maps to one endpoint and returns the decoded JSON document (a ``dict``), except
the iterators, which page for you, and :meth:`Client.reconciliation_result`, which returns the
result file's text. A refused call raises a :class:`CuebankError` subclass built from the
problem document.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import AsyncIterator, Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, Literal
from urllib.parse import quote

import httpx

from ._errors import ConnectionFailed, CuebankError, error_from_response

__all__ = ["DEFAULT_URL", "AsyncClient", "Client", "Json"]

DEFAULT_URL = "http://127.0.0.1:8000"
Json = dict[str, Any]
FileFormat = Literal["csv", "ndjson"]
MEDIA: dict[str, str] = {"csv": "text/csv", "ndjson": "application/x-ndjson"}
FINISHED = ("done", "failed", "cancelled")


def _body(data: bytes | str | Path) -> bytes:
    if isinstance(data, Path):
        return data.read_bytes()
    return data.encode("utf-8") if isinstance(data, str) else data


def _segment(text: str) -> str:
    return quote(text, safe="")


def _headers(key: str | None) -> dict[str, str]:
    headers = {"Accept": "application/json, application/problem+json"}
    if key:
        headers["Authorization"] = f"Bearer {key}"
    return headers


def _recall_body(cue: Mapping[str, Any], options: Mapping[str, Any]) -> Json:
    return {"cue": dict(cue), "options": dict(options)}


def _checked(response: httpx.Response) -> httpx.Response:
    if response.is_error:
        raise error_from_response(response)
    return response


def _transport_error(exc: httpx.TransportError, url: str) -> ConnectionFailed:
    return ConnectionFailed(
        type="about:blank",
        status=0,
        title="No answer",
        detail=f"no answer from {url}: {exc.__class__.__name__}: {exc}",
    )


class Client:
    """A blocking client.

    >>> with Client("http://127.0.0.1:8000", key="cbk_...") as cb:  # doctest: +SKIP
    ...     cb.recall("specimens", {"taxon": "Thalora marensis", "depth_m": 1.4})["verdict"]
    'recalled'
    """

    def __init__(
        self,
        url: str = DEFAULT_URL,
        key: str | None = None,
        *,
        timeout: float = 60.0,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.url = url.rstrip("/")
        self._http = httpx.Client(
            base_url=self.url, headers=_headers(key), timeout=timeout, transport=transport
        )

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._http.close()

    def _send(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        try:
            return _checked(self._http.request(method, path, **kwargs))
        except httpx.TransportError as exc:
            raise _transport_error(exc, self.url) from exc

    def _json(self, method: str, path: str, **kwargs: Any) -> Json:
        body: Json = self._send(method, path, **kwargs).json()
        return body

    # health
    def health(self) -> Json:
        """GET /healthz."""
        return self._json("GET", "/healthz")

    def ready(self) -> Json:
        """GET /readyz; raises :class:`Unavailable` when the database is not ready."""
        return self._json("GET", "/readyz")

    # collections
    def list_collections(self) -> list[Json]:
        items: list[Json] = self._json("GET", "/v1/collections")["items"]
        return items

    def create_collection(self, spec: Mapping[str, Any]) -> Json:
        """POST /v1/collections with ``{"name", "schema", "rule", ...}``."""
        return self._json("POST", "/v1/collections", json=dict(spec))

    def get_collection(self, name: str) -> Json:
        return self._json("GET", f"/v1/collections/{_segment(name)}")

    def update_collection(self, name: str, changes: Mapping[str, Any]) -> Json:
        return self._json("PATCH", f"/v1/collections/{_segment(name)}", json=dict(changes))

    def delete_collection(self, name: str) -> None:
        self._send("DELETE", f"/v1/collections/{_segment(name)}")

    def compile(self, name: str) -> Json:
        return self._json("POST", f"/v1/collections/{_segment(name)}/compile")

    def capacity(self, name: str) -> Json:
        return self._json("GET", f"/v1/collections/{_segment(name)}/capacity")

    # memories
    def put_memory(self, name: str, key: str, fields: Mapping[str, Any]) -> Json:
        path = f"/v1/collections/{_segment(name)}/memories/{_segment(key)}"
        return self._json("PUT", path, json={"fields": dict(fields)})

    def get_memory(self, name: str, key: str) -> Json:
        return self._json("GET", f"/v1/collections/{_segment(name)}/memories/{_segment(key)}")

    def delete_memory(self, name: str, key: str) -> None:
        self._send("DELETE", f"/v1/collections/{_segment(name)}/memories/{_segment(key)}")

    def list_memories(
        self, name: str, *, cursor: str | None = None, limit: int | None = None
    ) -> Json:
        """One page: ``{"items": [...], "next_cursor": ...}``."""
        params = {k: v for k, v in (("cursor", cursor), ("limit", limit)) if v is not None}
        return self._json("GET", f"/v1/collections/{_segment(name)}/memories", params=params)

    def iter_memories(self, name: str, *, page_size: int = 500) -> Iterator[Json]:
        """Every memory in key order, a page at a time."""
        cursor: str | None = None
        while True:
            page = self.list_memories(name, cursor=cursor, limit=page_size)
            yield from page["items"]
            cursor = page.get("next_cursor")
            if not cursor:
                return

    def import_memories(
        self,
        name: str,
        data: bytes | str | Path,
        *,
        format: FileFormat = "csv",
        skip_bad: bool = False,
    ) -> Json:
        """POST a CSV (``key`` + one column per field) or NDJSON body to the imports endpoint."""
        return self._json(
            "POST",
            f"/v1/collections/{_segment(name)}/imports",
            content=_body(data),
            headers={"Content-Type": MEDIA[format]},
            params={"skip_bad": "true"} if skip_bad else None,
        )

    # recall
    def recall(self, name: str, cue: Mapping[str, Any], **options: Any) -> Json:
        """Recall one cue; ``options`` are those of RecallOptionsSpec (mode, clamp, top_k...)."""
        path = f"/v1/collections/{_segment(name)}/recall"
        return self._json("POST", path, json=_recall_body(cue, options))

    def recall_batch(self, name: str, cues: Sequence[Mapping[str, Any]], **options: Any) -> Json:
        body = {"cues": [dict(c) for c in cues], "options": dict(options)}
        return self._json("POST", f"/v1/collections/{_segment(name)}/recall:batch", json=body)

    # reconciliation jobs
    def submit_reconciliation(
        self, name: str, data: bytes | str | Path, *, format: FileFormat = "csv"
    ) -> Json:
        return self._json(
            "POST",
            f"/v1/collections/{_segment(name)}/reconciliations",
            content=_body(data),
            headers={"Content-Type": MEDIA[format]},
        )

    def get_reconciliation(self, job_id: str) -> Json:
        return self._json("GET", f"/v1/reconciliations/{_segment(job_id)}")

    def cancel_reconciliation(self, job_id: str) -> Json:
        return self._json("DELETE", f"/v1/reconciliations/{_segment(job_id)}")

    def reconciliation_result(self, job_id: str, *, format: FileFormat = "csv") -> str:
        path = f"/v1/reconciliations/{_segment(job_id)}/result"
        return self._send("GET", path, params={"format": format}).text

    def wait_reconciliation(
        self,
        job_id: str,
        *,
        poll: float = 0.5,
        timeout: float | None = None,
        progress: Callable[[Json], None] | None = None,
    ) -> Json:
        """Poll the job until it ends; ``progress`` sees every reading."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            job = self.get_reconciliation(job_id)
            if progress is not None:
                progress(job)
            if job["state"] in FINISHED:
                return job
            if deadline is not None and time.monotonic() > deadline:
                raise CuebankError(
                    type="about:blank",
                    status=0,
                    title="Timed out",
                    detail=f"job {job_id} is still {job['state']} after {timeout} s",
                )
            time.sleep(poll)

    # keys and the audit log (admin scope)
    def create_key(
        self, scopes: Sequence[str], *, label: str = "", expires_in_days: int | None = None
    ) -> Json:
        """POST /v1/keys; the answer carries the secret, shown this once."""
        body: Json = {"scopes": list(scopes), "label": label}
        if expires_in_days is not None:
            body["expires_in_days"] = expires_in_days
        return self._json("POST", "/v1/keys", json=body)

    def list_keys(self) -> list[Json]:
        items: list[Json] = self._json("GET", "/v1/keys")["items"]
        return items

    def revoke_key(self, prefix: str) -> None:
        self._send("DELETE", f"/v1/keys/{_segment(prefix)}")

    def audit(self, *, cursor: str | None = None, limit: int | None = None) -> Json:
        """One page of the team's audit log."""
        params = {k: v for k, v in (("cursor", cursor), ("limit", limit)) if v is not None}
        return self._json("GET", "/v1/audit", params=params)


class AsyncClient:
    """The same calls as :class:`Client`, awaitable."""

    def __init__(
        self,
        url: str = DEFAULT_URL,
        key: str | None = None,
        *,
        timeout: float = 60.0,
        transport: httpx.AsyncBaseTransport | None = None,
    ) -> None:
        self.url = url.rstrip("/")
        self._http = httpx.AsyncClient(
            base_url=self.url, headers=_headers(key), timeout=timeout, transport=transport
        )

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()

    async def aclose(self) -> None:
        await self._http.aclose()

    async def _send(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        try:
            return _checked(await self._http.request(method, path, **kwargs))
        except httpx.TransportError as exc:
            raise _transport_error(exc, self.url) from exc

    async def _json(self, method: str, path: str, **kwargs: Any) -> Json:
        body: Json = (await self._send(method, path, **kwargs)).json()
        return body

    async def health(self) -> Json:
        return await self._json("GET", "/healthz")

    async def ready(self) -> Json:
        return await self._json("GET", "/readyz")

    async def list_collections(self) -> list[Json]:
        items: list[Json] = (await self._json("GET", "/v1/collections"))["items"]
        return items

    async def create_collection(self, spec: Mapping[str, Any]) -> Json:
        return await self._json("POST", "/v1/collections", json=dict(spec))

    async def get_collection(self, name: str) -> Json:
        return await self._json("GET", f"/v1/collections/{_segment(name)}")

    async def update_collection(self, name: str, changes: Mapping[str, Any]) -> Json:
        return await self._json("PATCH", f"/v1/collections/{_segment(name)}", json=dict(changes))

    async def delete_collection(self, name: str) -> None:
        await self._send("DELETE", f"/v1/collections/{_segment(name)}")

    async def compile(self, name: str) -> Json:
        return await self._json("POST", f"/v1/collections/{_segment(name)}/compile")

    async def capacity(self, name: str) -> Json:
        return await self._json("GET", f"/v1/collections/{_segment(name)}/capacity")

    async def put_memory(self, name: str, key: str, fields: Mapping[str, Any]) -> Json:
        path = f"/v1/collections/{_segment(name)}/memories/{_segment(key)}"
        return await self._json("PUT", path, json={"fields": dict(fields)})

    async def get_memory(self, name: str, key: str) -> Json:
        path = f"/v1/collections/{_segment(name)}/memories/{_segment(key)}"
        return await self._json("GET", path)

    async def delete_memory(self, name: str, key: str) -> None:
        await self._send("DELETE", f"/v1/collections/{_segment(name)}/memories/{_segment(key)}")

    async def list_memories(
        self, name: str, *, cursor: str | None = None, limit: int | None = None
    ) -> Json:
        params = {k: v for k, v in (("cursor", cursor), ("limit", limit)) if v is not None}
        path = f"/v1/collections/{_segment(name)}/memories"
        return await self._json("GET", path, params=params)

    async def iter_memories(self, name: str, *, page_size: int = 500) -> AsyncIterator[Json]:
        cursor: str | None = None
        while True:
            page = await self.list_memories(name, cursor=cursor, limit=page_size)
            for item in page["items"]:
                yield item
            cursor = page.get("next_cursor")
            if not cursor:
                return

    async def import_memories(
        self,
        name: str,
        data: bytes | str | Path,
        *,
        format: FileFormat = "csv",
        skip_bad: bool = False,
    ) -> Json:
        return await self._json(
            "POST",
            f"/v1/collections/{_segment(name)}/imports",
            content=_body(data),
            headers={"Content-Type": MEDIA[format]},
            params={"skip_bad": "true"} if skip_bad else None,
        )

    async def recall(self, name: str, cue: Mapping[str, Any], **options: Any) -> Json:
        path = f"/v1/collections/{_segment(name)}/recall"
        return await self._json("POST", path, json=_recall_body(cue, options))

    async def recall_batch(
        self, name: str, cues: Sequence[Mapping[str, Any]], **options: Any
    ) -> Json:
        body = {"cues": [dict(c) for c in cues], "options": dict(options)}
        path = f"/v1/collections/{_segment(name)}/recall:batch"
        return await self._json("POST", path, json=body)

    async def submit_reconciliation(
        self, name: str, data: bytes | str | Path, *, format: FileFormat = "csv"
    ) -> Json:
        return await self._json(
            "POST",
            f"/v1/collections/{_segment(name)}/reconciliations",
            content=_body(data),
            headers={"Content-Type": MEDIA[format]},
        )

    async def get_reconciliation(self, job_id: str) -> Json:
        return await self._json("GET", f"/v1/reconciliations/{_segment(job_id)}")

    async def cancel_reconciliation(self, job_id: str) -> Json:
        return await self._json("DELETE", f"/v1/reconciliations/{_segment(job_id)}")

    async def reconciliation_result(self, job_id: str, *, format: FileFormat = "csv") -> str:
        path = f"/v1/reconciliations/{_segment(job_id)}/result"
        return (await self._send("GET", path, params={"format": format})).text

    async def wait_reconciliation(
        self,
        job_id: str,
        *,
        poll: float = 0.5,
        timeout: float | None = None,
        progress: Callable[[Json], None] | None = None,
    ) -> Json:
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            job = await self.get_reconciliation(job_id)
            if progress is not None:
                progress(job)
            if job["state"] in FINISHED:
                return job
            if deadline is not None and time.monotonic() > deadline:
                raise CuebankError(
                    type="about:blank",
                    status=0,
                    title="Timed out",
                    detail=f"job {job_id} is still {job['state']} after {timeout} s",
                )
            await asyncio.sleep(poll)

    async def create_key(
        self, scopes: Sequence[str], *, label: str = "", expires_in_days: int | None = None
    ) -> Json:
        body: Json = {"scopes": list(scopes), "label": label}
        if expires_in_days is not None:
            body["expires_in_days"] = expires_in_days
        return await self._json("POST", "/v1/keys", json=body)

    async def list_keys(self) -> list[Json]:
        items: list[Json] = (await self._json("GET", "/v1/keys"))["items"]
        return items

    async def revoke_key(self, prefix: str) -> None:
        await self._send("DELETE", f"/v1/keys/{_segment(prefix)}")

    async def audit(self, *, cursor: str | None = None, limit: int | None = None) -> Json:
        params = {k: v for k, v in (("cursor", cursor), ("limit", limit)) if v is not None}
        return await self._json("GET", "/v1/audit", params=params)
