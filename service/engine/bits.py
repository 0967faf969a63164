"""±1 rows packed one bit per unit, and exact dot products against them.

Stored patterns and decoding codes are ±1 vectors: kept as bits they take a thirty-second of
their float32 bytes. Dot products with states of -1, 0 and +1 are counted on the bits for a
few states (popcount of the disagreements among the known units) and multiplied as float32
for many, on a copy unpacked for that product and dropped after. Either way the results are
exact integers.

Examples
--------
>>> import numpy as np
>>> bits = pack(np.array([[1, -1, 1, 1], [-1, -1, 1, -1]], dtype=np.int8))
>>> unpack(bits, 4).tolist()
[[1, -1, 1, 1], [-1, -1, 1, -1]]
>>> packed_dots(np.array([[1, 0, 1, -1]], dtype=np.float32), bits, 4)
array([[1., 1.]], dtype=float32)
"""

from __future__ import annotations

from typing import Final

import numpy as np
from numpy.typing import NDArray

__all__ = ["POPCOUNT_MAX_STATES", "pack", "packed_dots", "unpack", "unpack_f32"]

#: Up to this many states :func:`packed_dots` counts bits; above it multiplies. Measured at
#: P = 1,000, N = 1,024 on one core: popcount 38 µs at 1 state, 0.32 ms at 8, and 3.3 ms at
#: 64, against 1.1 ms for the float32 product.
POPCOUNT_MAX_STATES: Final = 24
#: Words of the (states, rows, words) temporary counted at a time: about a megabyte.
_CHUNK_WORDS: Final = 1 << 17


def pack(rows: NDArray[np.int8]) -> NDArray[np.uint8]:
    """±1 rows as bits, set for +1: an eighth of the int8 bytes."""
    return np.packbits(rows > 0, axis=1)


def unpack(bits: NDArray[np.uint8], n_units: int) -> NDArray[np.int8]:
    """The int8 ±1 rows that :func:`pack` packed."""
    u = np.unpackbits(bits, axis=1, count=n_units)
    u <<= 1
    u -= 1  # 0 → 255, which is -1 as int8
    return u.view(np.int8)


def unpack_f32(bits: NDArray[np.uint8], n_units: int) -> NDArray[np.float32]:
    """The rows as float32, column-major (``states @ rows.T`` then reads a row-major matrix)."""
    return np.asfortranarray(unpack(bits, n_units), dtype=np.float32)


def _words(bits: NDArray[np.uint8]) -> NDArray[np.uint64]:
    """Packed bit rows as 64-bit words, zero-padded to whole words (zeros count nothing)."""
    width = -(-bits.shape[1] // 8) * 8
    if width != bits.shape[1] or not bits.flags.c_contiguous:
        padded = np.zeros((bits.shape[0], width), dtype=np.uint8)
        padded[:, : bits.shape[1]] = bits
        bits = padded
    return bits.view(np.uint64)


def packed_dots(
    states: NDArray[np.float32], bits: NDArray[np.uint8], n_units: int
) -> NDArray[np.float32]:
    """x · s for every packed row x and state s, shape (n_states, n_rows), exact integers.

    ``states`` hold -1, 0 or +1 (0: unknown, contributes nothing).
    """
    if states.shape[0] > POPCOUNT_MAX_STATES:
        return np.asarray(states @ unpack_f32(bits, n_units).T, dtype=np.float32)
    stored = _words(bits)
    signs = _words(np.packbits(states > 0, axis=1))
    known = _words(np.packbits(states != 0, axis=1))
    n_known = np.count_nonzero(states, axis=1).astype(np.int64)
    out = np.empty((states.shape[0], stored.shape[0]), dtype=np.float32)
    step = max(1, _CHUNK_WORDS // max(1, states.shape[0] * stored.shape[1]))
    for lo in range(0, stored.shape[0], step):
        chunk = stored[lo : lo + step]
        differ = (signs[:, None, :] ^ chunk[None, :, :]) & known[:, None, :]
        counted = np.bitwise_count(differ).sum(axis=2, dtype=np.int64)
        out[:, lo : lo + step] = n_known[:, None] - 2 * counted
    return out
