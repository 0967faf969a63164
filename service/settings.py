"""Service settings, read from ``CUEBANK_*`` environment variables.

Build them once through :func:`get_settings` and pass the object down (``create_app(settings)``);
tests construct their own :class:`Settings` instead of mutating the environment.

>>> s = Settings(data_dir=Path("/srv/cuebank"), database_url=None)
>>> s.resolved_database_url
'sqlite:////srv/cuebank/cuebank.sqlite3'
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Literal, Self

from pydantic import Field, SecretStr, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

__all__ = ["MIB", "Settings", "get_settings"]

MIB = 1024 * 1024


class Settings(BaseSettings):
    """Everything the service can be configured with; every limit has a safe default."""

    model_config = SettingsConfigDict(env_prefix="CUEBANK_", extra="forbid", frozen=True)

    data_dir: Path = Field(
        default=Path("./cuebank-data"),
        description="Directory for the default SQLite database and other local state.",
    )
    database_url: str | None = Field(
        default=None,
        description=(
            "SQLAlchemy URL of the database, e.g. postgresql+psycopg://user@host/db. "
            "Unset means a SQLite file inside data_dir."
        ),
    )
    sqlite_synchronous: Literal["FULL", "NORMAL"] = Field(
        default="FULL",
        description=(
            "SQLite's synchronous pragma. FULL fsyncs the write-ahead log on every commit, so a "
            "committed write survives a power cut as long as the disk honours fsync. NORMAL is "
            "faster and still never corrupts the file in WAL mode, but the last commits before a "
            "power cut may be lost."
        ),
    )
    cache_bytes: int = Field(
        default=512 * MIB, ge=0, description="Memory budget for compiled collections."
    )
    shutdown_drain_seconds: float = Field(
        default=0.0,
        ge=0,
        le=600,
        description=(
            "On SIGTERM, how long to keep serving with /readyz answering 503 before the server "
            "stops accepting connections, so a load balancer can take the worker out first. "
            "Requests in flight finish either way."
        ),
    )
    key_cache_seconds: float = Field(
        default=5.0,
        ge=0.0,
        le=300.0,
        description=(
            "How long a worker keeps accepting an API key it has checked without asking the "
            "database again. A key revoked through another worker (or the CLI) stops working "
            "on this one within this time; the worker that revokes it stops at once. 0 checks "
            "every request against the database."
        ),
    )
    engine_threads: int = Field(
        default=1,
        ge=1,
        le=64,
        description=(
            "Recall computations a worker runs at once (single-cue runs and batch requests). "
            "Their Python parts hold the GIL, so more than the worker's share of cores only "
            "adds contention; the rest queue. Run more workers for more cores."
        ),
    )
    recall_batch_max: int = Field(
        default=64,
        ge=1,
        le=1024,
        description=(
            "The most concurrent single-cue recalls on one collection settled together in one "
            "matrix product (they queue while the previous product runs; none waits for "
            "company). 1 settles every cue alone."
        ),
    )
    warm_on_start: bool = Field(
        default=False,
        description=(
            "Compile every collection in the background when a worker starts, so the first "
            "recall of each does not pay for the compile."
        ),
    )
    log_level: Literal["CRITICAL", "ERROR", "WARNING", "INFO", "DEBUG"] = "INFO"
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=0, le=65535)

    # Hard limits: exceeding one must be a clear 4xx, never a crash or a hang.
    max_body_bytes: int = Field(default=1 * MIB, gt=0)
    max_bulk_body_bytes: int = Field(default=32 * MIB, gt=0)
    max_fields: int = Field(default=64, gt=0)
    max_units: int = Field(default=16384, gt=0)
    max_memories: int = Field(default=200_000, gt=0)
    max_batch: int = Field(default=1024, gt=0)
    max_text_length: int = Field(default=1024, gt=0)
    max_steps: int = Field(default=200, gt=0)
    max_page_size: int = Field(default=500, gt=0)
    default_page_size: int = Field(default=100, gt=0)
    max_json_depth: int = Field(
        default=32, gt=0, description="Deepest nesting of arrays and objects in a JSON body."
    )
    max_import_line_bytes: int = Field(
        default=256 * 1024,
        gt=0,
        description="Longest line of an NDJSON or CSV import (or reconciliation) file.",
    )

    # Keys and abuse control.
    key_pepper: SecretStr | None = Field(
        default=None,
        description=(
            "Server secret mixed into every stored key hash (HMAC-SHA-256), at least 32 "
            "characters. Unset with SQLite: generated once into data_dir/key_pepper (mode 0600). "
            "Required with PostgreSQL, where workers on several machines must share it."
        ),
    )
    rate_per_second: float = Field(
        default=50.0, gt=0, description="Requests per second each key may sustain (per worker)."
    )
    burst: int = Field(default=100, gt=0, description="Requests a key may send at once.")
    auth_failures_per_minute: int = Field(
        default=20,
        gt=0,
        description="Failed authentications one client address may make in a minute before "
        "its requests are refused with 429 until the minute is over.",
    )

    @model_validator(mode="after")
    def _check_consistency(self) -> Self:
        if self.default_page_size > self.max_page_size:
            raise ValueError(
                f"default_page_size is {self.default_page_size}, above max_page_size "
                f"{self.max_page_size}"
            )
        if self.max_bulk_body_bytes < self.max_body_bytes:
            raise ValueError(
                f"max_bulk_body_bytes is {self.max_bulk_body_bytes}, below max_body_bytes "
                f"{self.max_body_bytes}"
            )
        if self.key_pepper is not None and len(self.key_pepper.get_secret_value()) < 32:
            raise ValueError("key_pepper must be at least 32 characters long")
        return self

    @property
    def resolved_database_url(self) -> str:
        """The database URL to connect to: ``database_url`` or the SQLite file in ``data_dir``."""
        if self.database_url:
            return self.database_url
        # An absolute path keeps the URL meaning the same file whatever the working directory
        # is when a worker or a migration later opens it.
        path = (self.data_dir.expanduser().absolute() / "cuebank.sqlite3").as_posix()
        return f"sqlite:///{path}"


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """Settings from the environment, built once per process."""
    return Settings()
