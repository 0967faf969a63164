"""Page sizes and opaque page cursors, shared by every listing use-case.

A cursor is the position after the last item of a page, tagged with what it points into (so a
memory cursor is refused by the audit log), URL-safe base64 without padding.

>>> decode_cursor("k1", encode_cursor("k1", "SMP-2024-00017"))
'SMP-2024-00017'
"""

from __future__ import annotations

import base64
import binascii

from service.settings import Settings

from .errors import CursorInvalid, LimitExceeded, OptionInvalid

__all__ = ["decode_cursor", "encode_cursor", "page_size"]


def page_size(settings: Settings, limit: object) -> int:
    """The page size a caller asked for (default when None), checked against the limit."""
    size = settings.default_page_size if limit is None else limit
    if isinstance(size, bool) or not isinstance(size, int) or size < 1:
        raise OptionInvalid(f"limit must be a positive integer, got {limit!r}", field="limit")
    if size > settings.max_page_size:
        raise LimitExceeded(
            f"limit is {size}, above the page size limit of {settings.max_page_size}",
            limit="max_page_size",
            value=size,
            maximum=settings.max_page_size,
        )
    return size


def encode_cursor(tag: str, position: str) -> str:
    """An opaque cursor for ``position`` within the listing named by ``tag``."""
    raw = f"{tag}:{position}".encode()
    return base64.urlsafe_b64encode(raw).decode("ascii").rstrip("=")


def decode_cursor(tag: str, cursor: str) -> str:
    """The position a cursor of listing ``tag`` holds; CursorInvalid for anything else."""
    try:
        padded = cursor + "=" * (-len(cursor) % 4)
        text = base64.urlsafe_b64decode(padded.encode("ascii")).decode("utf-8")
        if not text.startswith(f"{tag}:"):
            raise ValueError("a cursor of another listing")
        return text[len(tag) + 1 :]
    except (ValueError, binascii.Error, UnicodeError):
        raise CursorInvalid(
            f"cursor {cursor[:40]!r} is not a cursor this service issued; start again without one",
            field="cursor",
        ) from None
