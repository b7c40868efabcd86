"""Frame checksums of serial sensor boards, computed over many frames at once.

Each function takes the covered bytes of ``n`` frames as a ``(n, m)`` uint8 array (or one frame
as ``bytes``) and returns the ``n`` checksums. The loop runs over the ``m`` byte columns, never
over frames, so checking a million candidate frames costs a dozen numpy passes.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from crankbeat.errors import InputError


def _crc16_table(poly: int) -> np.ndarray:
    table = np.zeros(256, dtype=np.uint16)
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ poly) if crc & 0x8000 else (crc << 1)
        table[byte] = crc & 0xFFFF
    return table


def _crc16_pair_table(table: np.ndarray) -> np.ndarray:
    """Two bytes per step: with a 16-bit register, feeding bytes b0, b1 to register c gives
    what feeding two zero bytes to ``c ^ (b0 << 8 | b1)`` gives, so one lookup in this
    65536-entry table replaces two steps (half the numpy passes per frame column)."""
    c = np.arange(65536, dtype=np.uint32)
    for _ in range(2):
        c = ((c << 8) & 0xFFFF) ^ table[c >> 8]
    return c.astype(np.uint16)


_CCITT_TABLE = _crc16_table(0x1021)
_CCITT_PAIRS = _crc16_pair_table(_CCITT_TABLE)


def _as_frames(data: bytes | bytearray | memoryview | np.ndarray) -> tuple[np.ndarray, bool]:
    """(n, m) uint8 view of the input, and whether a single frame was given as bytes."""
    if isinstance(data, bytes | bytearray | memoryview):
        return np.frombuffer(bytes(data), dtype=np.uint8)[None, :], True
    arr = np.asarray(data)
    if arr.dtype != np.uint8 or arr.ndim != 2:
        raise InputError(
            "checksum input must be bytes or a (n, m) uint8 array, "
            f"got {arr.dtype} shape {arr.shape}"
        )
    return arr, False


def _result(values: np.ndarray, single: bool):
    return int(values[0]) if single else values


def crc16_ccitt_false(data):
    """CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, no final xor.

    Parameters
    ----------
    data : bytes or (n, m) uint8 array
        One frame's covered bytes, or the covered bytes of ``n`` frames as rows.

    Returns
    -------
    int or (n,) uint16 array
        The CRC of each row (an ``int`` when ``data`` was bytes).
    """
    frames, single = _as_frames(data)
    crc = np.full(frames.shape[0], 0xFFFF, dtype=np.uint16)
    m = frames.shape[1]
    if m >= 2:
        # the columns as big-endian byte pairs: one table lookup per pair
        pairs = np.ascontiguousarray(frames[:, : m - m % 2]).view(">u2").astype(np.uint16)
        for col in range(pairs.shape[1]):
            crc = _CCITT_PAIRS[crc ^ pairs[:, col]]
    if m % 2:
        idx = (crc >> 8) ^ frames[:, m - 1]
        crc = (crc << 8) ^ _CCITT_TABLE[idx]
    return _result(crc, single)


def sum8(data):
    """Arithmetic sum of the bytes modulo 256 (``(n,)`` uint8, or ``int`` for bytes input)."""
    frames, single = _as_frames(data)
    return _result((frames.sum(axis=1, dtype=np.uint32) & 0xFF).astype(np.uint8), single)


def xor8(data):
    """Bitwise xor of the bytes (``(n,)`` uint8, or ``int`` for bytes input)."""
    frames, single = _as_frames(data)
    if frames.shape[1] == 0:
        return _result(np.zeros(frames.shape[0], dtype=np.uint8), single)
    return _result(np.bitwise_xor.reduce(frames, axis=1).astype(np.uint8), single)


#: Checksum kind (as named in rig files) -> vectorised function.
CHECKSUM_FUNCTIONS: dict[str, Callable] = {
    "crc16-ccitt-false": crc16_ccitt_false,
    "sum8": sum8,
    "xor8": xor8,
}
