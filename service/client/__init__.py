"""A typed Python client of the Cuebank HTTP API (httpx only; no server code is imported).

>>> from service.client import Client, NotFound
>>> issubclass(NotFound, CuebankError)
True
"""

from ._client import DEFAULT_URL, AsyncClient, Client, Json
from ._errors import (
    Conflict,
    ConnectionFailed,
    CuebankError,
    Forbidden,
    InvalidInput,
    LimitExceeded,
    NotFound,
    RateLimited,
    ServerError,
    Unauthorized,
    Unavailable,
    error_from_response,
)

__all__ = [
    "DEFAULT_URL",
    "AsyncClient",
    "Client",
    "Conflict",
    "ConnectionFailed",
    "CuebankError",
    "Forbidden",
    "InvalidInput",
    "Json",
    "LimitExceeded",
    "NotFound",
    "RateLimited",
    "ServerError",
    "Unauthorized",
    "Unavailable",
    "error_from_response",
]
