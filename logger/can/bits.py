"""Signal bit layouts of CAN frames: vectorised decode and encode over many frames at once.

Bit numbering follows the usual DBC conventions (see :class:`logger.rig.model.CanSignal`):
bit ``n`` of a frame is bit ``n % 8`` (0 = LSB) of byte ``n // 8``. A little-endian signal's
``start_bit`` is its LSB and it grows towards higher bit numbers; a big-endian signal's
``start_bit`` is its MSB and it runs through the bits of a byte downwards, then into the next
byte from its bit 7 (the "sawtooth").

Both orders reduce to the same work: a signal touches a few bytes, and inside one byte its bits
are contiguous and map onto value bits by one constant shift. So a decode is one masked shift per
touched byte (at most 9 for a 64-bit signal), done on whole columns of the frame array; nothing
loops over frames.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from crankbeat.errors import InputError
from crankbeat.logger.rig.model import CanSignal

__all__ = ["decode_raw", "decode_signal", "encode_signal", "signal_bits", "signal_end_byte"]

# (byte index, mask within that byte, left shift from byte bit to value bit; negative = right)
_Piece = tuple[int, int, int]


def _check_signal(signal: CanSignal) -> None:
    if not 1 <= signal.length <= 64:
        raise InputError(f"signal {signal.name!r}: length must be 1..64 bits, got {signal.length}")
    if signal.count < 1:
        raise InputError(f"signal {signal.name!r}: count must be >= 1, got {signal.count}")
    if signal.start_bit < 0:
        raise InputError(f"signal {signal.name!r}: start_bit must be >= 0, got {signal.start_bit}")
    if signal.byte_order not in ("little", "big"):
        raise InputError(
            f"signal {signal.name!r}: byte_order must be 'little' or 'big', "
            f"got {signal.byte_order!r}"
        )


def _element_bits(signal: CanSignal, element: int) -> list[int]:
    """Frame bit numbers of one element, value LSB first."""
    n = signal.length
    if signal.byte_order == "little":
        first = signal.start_bit + element * n
        return list(range(first, first + n))
    # Motorola: walk MSB-first "linear" positions q, where q = 8*byte + (7 - bit).
    sb = signal.start_bit
    p = (sb // 8) * 8 + (7 - sb % 8) + element * n
    msb_first = [(q // 8) * 8 + (7 - q % 8) for q in range(p, p + n)]
    return msb_first[::-1]


@lru_cache(maxsize=1024)
def _pieces(signal: CanSignal) -> tuple[tuple[_Piece, ...], ...]:
    """For each element: the per-byte (byte, mask, shift) pieces that assemble its raw value."""
    _check_signal(signal)
    out = []
    for e in range(signal.count):
        by_byte: dict[int, list[tuple[int, int]]] = {}
        for k, bit in enumerate(_element_bits(signal, e)):
            by_byte.setdefault(bit // 8, []).append((bit % 8, k))
        pieces = []
        for byte, pairs in sorted(by_byte.items()):
            mask = 0
            for b, _ in pairs:
                mask |= 1 << b
            shift = pairs[0][1] - pairs[0][0]
            pieces.append((byte, mask, shift))
        out.append(tuple(pieces))
    return tuple(out)


def signal_bits(signal: CanSignal) -> set[int]:
    """The frame bit numbers (``8 * byte + bit``, bit 0 = LSB) the signal occupies.

    Covers every element of an array signal. Useful to check that signals do not overlap.
    """
    _check_signal(signal)
    bits: set[int] = set()
    for e in range(signal.count):
        bits.update(_element_bits(signal, e))
    return bits


def signal_end_byte(signal: CanSignal) -> int:
    """One past the highest byte index the signal touches (the shortest frame that holds it)."""
    return max(signal_bits(signal)) // 8 + 1


def _as_frames(data: np.ndarray, signal: CanSignal) -> np.ndarray:
    data = np.asarray(data)
    if data.dtype != np.uint8 or data.ndim != 2:
        raise InputError(
            f"frame data must be a 2-D uint8 array (frames, bytes), got {data.dtype} "
            f"with shape {data.shape}"
        )
    need = signal_end_byte(signal)
    if data.shape[1] < need:
        raise InputError(
            f"signal {signal.name!r} needs {need} data bytes, frames have {data.shape[1]}"
        )
    return data


def _raw_unsigned(data: np.ndarray, pieces: tuple[_Piece, ...]) -> np.ndarray:
    acc = np.zeros(data.shape[0], dtype=np.uint64)
    for byte, mask, shift in pieces:
        col = data[:, byte]
        if mask != 0xFF:
            col = col & np.uint8(mask)
        col = col.astype(np.uint64)
        if shift > 0:
            col <<= np.uint64(shift)
        elif shift < 0:
            col >>= np.uint64(-shift)
        acc |= col
    return acc


def _squeeze(values: np.ndarray, signal: CanSignal) -> np.ndarray:
    return values[:, 0] if signal.count == 1 else values


def _unsigned_all(data: np.ndarray, signal: CanSignal) -> np.ndarray:
    per = _pieces(signal)
    out = np.empty((data.shape[0], signal.count), dtype=np.uint64)
    for e, pieces in enumerate(per):
        out[:, e] = _raw_unsigned(data, pieces)
    return out


def _to_signed(u: np.ndarray, length: int) -> np.ndarray:
    if length == 64:
        return u.view(np.int64)
    s = u.astype(np.int64)
    sign = np.int64(1 << (length - 1))
    return (s ^ sign) - sign


def decode_raw(data: np.ndarray, signal: CanSignal) -> np.ndarray:
    """Integer raw values of a signal in many frames.

    Parameters
    ----------
    data : (m, L) uint8
        Frame payloads, one row per frame (L >= the bytes the signal touches).
    signal : CanSignal
        Layout of the signal.

    Returns
    -------
    raw : (m,) or (m, count) int64 or uint64
        ``int64`` two's complement values when ``signal.signed``, else ``uint64``. Shape
        ``(m, count)`` for array signals (``count > 1``), element 0 first.
    """
    data = _as_frames(data, signal)
    u = _unsigned_all(data, signal)
    if signal.signed:
        return _squeeze(_to_signed(u, signal.length), signal)
    return _squeeze(u, signal)


def decode_signal(data: np.ndarray, signal: CanSignal) -> np.ndarray:
    """Physical values (``raw * scale + offset``) of a signal in many frames.

    Parameters
    ----------
    data : (m, L) uint8
        Frame payloads, one row per frame.
    signal : CanSignal
        Layout and scaling of the signal.

    Returns
    -------
    values : (m,) or (m, count) float64
        Physical values in ``signal.unit``; NaN where the raw value equals
        ``signal.saturated_raw`` (compared on the raw bit pattern, so ``-1`` and ``0xFF`` mean
        the same for an 8-bit signed signal).
    """
    data = _as_frames(data, signal)
    u = _unsigned_all(data, signal)
    raw = _to_signed(u, signal.length) if signal.signed else u
    values = raw.astype(np.float64)
    if signal.scale != 1.0:
        values *= signal.scale
    if signal.offset != 0.0:
        values += signal.offset
    if signal.saturated_raw is not None:
        pattern = np.uint64(signal.saturated_raw & ((1 << signal.length) - 1))
        values[u == pattern] = np.nan
    return _squeeze(values, signal)


def _raw_range(signal: CanSignal) -> tuple[int, int]:
    n = signal.length
    if signal.signed:
        return -(1 << (n - 1)), (1 << (n - 1)) - 1
    return 0, (1 << n) - 1


def encode_signal(values: np.ndarray | float, signal: CanSignal, data: np.ndarray) -> None:
    """Write physical values of a signal into frame payloads, in place.

    Parameters
    ----------
    values : float or (m,) or (m, count) array_like
        Physical values in ``signal.unit``; broadcast against ``(m, count)``. Scale and offset
        are inverted, the result rounded to the nearest integer and clipped to the raw range.
        NaN is written as ``signal.saturated_raw`` (an error when the signal has none).
    signal : CanSignal
        Layout and scaling of the signal.
    data : (m, L) uint8
        Frame payloads; only the signal's bits are changed.
    """
    data = _as_frames(data, signal)
    m = data.shape[0]
    v = np.asarray(values, dtype=np.float64)
    if signal.count == 1 and v.ndim == 1:
        v = v[:, None]
    try:
        v = np.broadcast_to(v, (m, signal.count))
    except ValueError:
        raise InputError(
            f"signal {signal.name!r}: values of shape {np.shape(values)} do not fit "
            f"{m} frames x {signal.count} elements"
        ) from None
    nan = np.isnan(v)
    if nan.any() and signal.saturated_raw is None:
        raise InputError(f"signal {signal.name!r}: NaN value but the signal has no saturated_raw")
    lo, hi = _raw_range(signal)
    raw_f = np.rint((np.where(nan, 0.0, v) - signal.offset) / signal.scale)
    raw_f = np.clip(raw_f, float(lo), float(hi))
    mask = (1 << signal.length) - 1
    # float64 cannot hold every 64-bit integer; such signals are clipped at the float range.
    if signal.signed:
        u = np.minimum(raw_f, float(2**63 - 1024)).astype(np.int64).view(np.uint64)
        u = u & np.uint64(mask)
    else:
        u = np.minimum(raw_f, float(2**64 - 2048)).astype(np.uint64)
    if nan.any():
        u = np.where(nan, np.uint64(signal.saturated_raw & mask), u)
    for e, pieces in enumerate(_pieces(signal)):
        col_u = u[:, e]
        for byte, bmask, shift in pieces:
            part = col_u >> np.uint64(shift) if shift > 0 else col_u << np.uint64(-shift)
            part = (part & np.uint64(bmask)).astype(np.uint8)
            data[:, byte] = (data[:, byte] & np.uint8(~bmask & 0xFF)) | part
