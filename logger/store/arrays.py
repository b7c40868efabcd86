"""Arrays kept in one column: little-endian float64 bytes, NaN where a value is missing.

Used where a run has a grid of numbers that no SQL query looks into cell by cell (the order
maps): one value per grid instead of one row per cell. float64 keeps every value exactly as
the analysis gave it, so a map read back equals the analysis output bit for bit.
"""

from __future__ import annotations

import numpy as np

#: The stored type: little-endian IEEE 754 double, whatever the machine.
STORED = np.dtype("<f8")


def pack(values) -> bytes:
    """Numbers (any shape; None is NaN) as bytes, row by row."""
    arr = np.asarray(values, dtype=float)
    return np.ascontiguousarray(arr, dtype=STORED).tobytes()


def unpack(blob: bytes, shape: tuple[int, ...] | int) -> np.ndarray:
    """The array :func:`pack` made, in the machine's float64 (a fresh, writable array)."""
    arr = np.frombuffer(blob, dtype=STORED).astype(float)
    return arr.reshape(shape)
