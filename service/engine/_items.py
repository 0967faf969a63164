"""Deterministic item vectors: the random ±1 codes every record encoding is built from.

An item vector is read straight out of SHAKE-256 over a canonical byte string naming what the
vector stands for, so no codebook is stored and no PRNG stream is involved: NumPy documents that
its generators may change their output between versions, while SHAKE-256 is fixed by FIPS 202.
The same (seed, field, role, token) gives the same vector on every machine and Python version.
"""

from __future__ import annotations

import functools
import hashlib
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

__all__ = ["CODEC_VERSION", "item_bits", "item_bytes", "item_vector", "sum_of_items"]

CODEC_VERSION = 1
"""Bumped whenever the byte encoding below changes; stored patterns of an older version must be
re-encoded, so the version is part of every hash rather than a comment."""

_DOMAIN = b"cuebank.item"
_CACHE_SIZE = 1 << 16
_SIGNS = np.array([-1, 1], dtype=np.int8)


def _part(data: bytes) -> bytes:
    # A length prefix keeps ("ab", "c") and ("a", "bc") apart without reserving a separator byte.
    return len(data).to_bytes(4, "big") + data


def item_bytes(seed: int, field: str, role: str, token: str) -> bytes:
    """Canonical byte string hashed into the item vector of one token.

    Parameters
    ----------
    seed : int
        Collection seed; any Python int (written in decimal, so negative and huge seeds work).
    field : str
        Field name, or an empty string for blocks that belong to no field (the identity block).
    role : str
        What the token is (``"value"``, ``"gram"``, ``"null"``, ...), so that the same string in
        two roles never shares a vector.
    token : str
        The token itself.

    Returns
    -------
    bytes
        The message fed to SHAKE-256.

    Examples
    --------
    >>> item_bytes(7, "site", "value", "north jetty")[:12]
    b'cuebank.item'
    """
    return _prefix(seed, field, role) + _part(token.encode("utf-8"))


@functools.lru_cache(maxsize=1024)
def _prefix(seed: int, field: str, role: str) -> bytes:
    # Every token of a field shares this prefix; building it once keeps a cache miss cheap.
    parts = (str(CODEC_VERSION), str(seed), field, role)
    return _DOMAIN + b"".join(_part(p.encode("utf-8")) for p in parts)


@functools.lru_cache(maxsize=_CACHE_SIZE)
def item_bits(seed: int, field: str, role: str, token: str, n_units: int) -> bytes:
    """The item vector of one token packed as bits (1 is +1), ``ceil(n_units / 8)`` bytes.

    Examples
    --------
    >>> len(item_bits(7, "site", "value", "north jetty", 20))
    3
    """
    return hashlib.shake_256(item_bytes(seed, field, role, token)).digest((n_units + 7) // 8)


@functools.lru_cache(maxsize=_CACHE_SIZE)
def item_vector(seed: int, field: str, role: str, token: str, n_units: int) -> npt.NDArray[np.int8]:
    """The ±1 item vector of one token.

    Vectors of different lengths for the same token are prefixes of one another, which is harmless:
    two blocks of a pattern never share a (field, role, token) triple.

    Parameters
    ----------
    seed, field, role, token
        See :func:`item_bytes`.
    n_units : int
        Length of the vector, ≥ 1.

    Returns
    -------
    numpy.ndarray of int8, shape (n_units,)
        Values in {-1, +1}. The array is read-only because it is shared through the cache.

    Examples
    --------
    >>> v = item_vector(7, "site", "value", "north jetty", 16)
    >>> v.shape, sorted(set(v.tolist()))
    ((16,), [-1, 1])
    >>> bool((v == item_vector(7, "site", "value", "north jetty", 16)).all())
    True
    """
    packed = np.frombuffer(item_bits(seed, field, role, token, n_units), dtype=np.uint8)
    vector = _SIGNS[np.unpackbits(packed, count=n_units)]
    vector.flags.writeable = False
    return vector


def sum_of_items(
    seed: int, field: str, role: str, tokens: Sequence[str], n_units: int
) -> npt.NDArray[np.int32]:
    """Sum of the item vectors of ``tokens``, a repeated token counting each time.

    Works on the packed bits: joining bytes and unpacking once is several times faster than
    stacking one array per token.

    Examples
    --------
    >>> total = sum_of_items(7, "notes", "gram", ["ab", "bc", "ab"], 8)
    >>> bool((total == 2 * item_vector(7, "notes", "gram", "ab", 8)
    ...       + item_vector(7, "notes", "gram", "bc", 8)).all())
    True
    """
    packed = b"".join([item_bits(seed, field, role, token, n_units) for token in tokens])
    rows = np.frombuffer(packed, dtype=np.uint8).reshape(len(tokens), -1)
    ones = np.unpackbits(rows, axis=1, count=n_units).sum(axis=0, dtype=np.int32)
    total: npt.NDArray[np.int32] = 2 * ones - np.int32(len(tokens))
    return total
