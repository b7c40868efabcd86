"""The simulated ride as the rig's CAN frames: ids, payloads and receive timestamps.

Frames are laid out exactly as the rig file says (any rig: the messages and roles it defines,
bit layouts through :func:`logger.can.bits.encode_signal`). A tooth frame carries ``count``
consecutive tooth periods, oldest first; its timestamp is the last edge in it plus the
interface's latency and jitter. Receive times are rounded to the microsecond (candump's
resolution), never go backwards, and keep one frame time apart at the rig's bit rate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.errors import InputError
from crankbeat.logger.can.bits import encode_signal

FRAME_BITS = 130  # an 8-byte classic frame with an 11-bit id, bit stuffing included (about)


@dataclass
class CanFrames:
    """All frames of a ride in receive order."""

    t: np.ndarray  # (n,) float64, receive timestamps, s
    can_id: np.ndarray  # (n,) int64
    extended: np.ndarray  # (n,) bool
    dlc: np.ndarray  # (n,) int64
    data: np.ndarray  # (n, width) uint8, width = the longest frame (bytes beyond dlc are zero)
    kind: np.ndarray  # (n,) int8: 0 teeth, 1 status, 2 unknown id

    def __len__(self) -> int:
        return len(self.t)


def _counter(msg, index: np.ndarray, data: np.ndarray) -> None:
    sig = next((s for s in msg.signals if s.role == "counter"), None)
    if sig is not None:
        modulo = sig.modulo or (1 << sig.length)
        encode_signal(np.mod(index, modulo).astype(float) * sig.scale + sig.offset, sig, data)


def teeth_frames(ride) -> tuple[np.ndarray, np.ndarray, object]:
    """(event time of each tooth frame, payloads, message) — before latency."""
    rig = ride.rig
    msg = rig.message_for("tooth_periods")
    if msg is None:
        raise InputError(f"rig {rig.name!r} has no tooth_periods signal to simulate")
    sig = msg.signal_for("tooth_periods")
    k = sig.count
    # An ECU measures tooth periods with a free-running capture timer: each period is the
    # difference of two quantised edge stamps, so the quantisation telescopes (a sum of periods
    # is off by at most one tick, not by a random walk of independent roundings).
    edge = np.asarray(ride.tooth_time, dtype=float)
    ticks = np.round((edge - edge[0]) / sig.scale) if edge.size else edge
    periods = np.diff(ticks) * sig.scale
    last_edge = ride.tooth_time[1:]
    cam = ride.tooth_cam[1:]
    m = len(periods) // k
    periods = periods[: m * k].reshape(m, k)
    t = last_edge[k - 1 : m * k : k]
    data = np.zeros((m, msg.length), dtype=np.uint8)
    full_scale = ((1 << sig.length) - 1) * sig.scale + sig.offset
    sat = sig.saturated_raw
    if sat is not None:
        limit = sat * sig.scale + sig.offset
        values = np.where(periods >= limit - 0.5 * sig.scale, np.nan, periods)
    else:
        values = np.minimum(periods, full_scale)
    encode_signal(values, sig, data)
    cam_sig = msg.signal_for("cam_level")
    if cam_sig is not None:
        encode_signal(np.clip(cam[k - 1 : m * k : k], 0, 1).astype(float), cam_sig, data)
    _counter(msg, np.arange(m), data)
    return t, data, msg


def status_frames(ride) -> list[tuple[np.ndarray, np.ndarray, object]]:
    """(times, payloads, message) of every message carrying status roles, each at its rate."""
    rig = ride.rig
    teeth = rig.message_for("tooth_periods")
    out = []
    if len(ride.status_t) == 0:
        return out
    t_rel = ride.status_t - ride.start_time
    for msg in rig.messages:
        roles = [s.role for s in msg.signals if s.role in ride.status]
        if msg is teeth or not roles:
            continue
        rate = msg.rate_hz or 100.0
        t = np.arange(1, int(np.floor(ride.scenario.duration * rate)) + 1) / rate
        data = np.zeros((len(t), msg.length), dtype=np.uint8)
        for sig in msg.signals:
            if sig.role not in ride.status:
                continue
            values = ride.status[sig.role]
            if sig.role == "gear":  # a gear is never between two gears
                i = np.clip(np.searchsorted(t_rel, t, side="right") - 1, 0, len(values) - 1)
                v = values[i]
            else:
                v = np.interp(t, t_rel, values)
            encode_signal(v, sig, data)
        _counter(msg, np.arange(len(data)), data)
        out.append((t + ride.start_time, data, msg))
    return out


def _monotonic(t: np.ndarray, gap: float) -> np.ndarray:
    """Smallest times >= t that are non-decreasing and at least ``gap`` apart (bus arbitration).

    t_i = max(t_i, t_{i-1} + gap) has the closed form i·gap + max_{j<=i}(t_j − j·gap).
    """
    i = np.arange(len(t)) * gap
    return np.maximum.accumulate(t - i) + i


def build_frames(ride) -> CanFrames:
    """Every CAN frame of the ride, with the scenario's latency, jitter, drops and foreign ids."""
    spec = ride.scenario.can
    rng = ride.rng("can")
    parts = []
    tt, td, tmsg = teeth_frames(ride)
    parts.append((tt, td, tmsg.can_id, tmsg.extended, tmsg.length, 0))
    for st_t, st_data, st_msg in status_frames(ride):
        parts.append((st_t, st_data, st_msg.can_id, st_msg.extended, st_msg.length, 1))
    if spec.unknown_ids:
        n = int(ride.scenario.duration * spec.unknown_rate_hz)
        ut = ride.start_time + np.sort(rng.random(n)) * ride.scenario.duration
        ids = np.asarray(spec.unknown_ids)[rng.integers(0, len(spec.unknown_ids), n)]
        ud = rng.integers(0, 256, (n, 8)).astype(np.uint8)
        for cid in np.unique(ids):
            sel = ids == cid
            parts.append((ut[sel], ud[sel], int(cid), int(cid) > 0x7FF, 8, 2))
    cols: dict[str, list[np.ndarray]] = {k: [] for k in ("t", "id", "ext", "dlc", "data", "kind")}
    width = max([8] + [p[4] for p in parts])  # CAN FD rigs carry up to 64 bytes
    for t, data, cid, ext, dlc, kind in parts:
        n = len(t)
        # Latency with jitter; one id's frames keep their order (a node sends them in turn).
        recv = t + spec.latency_s + spec.jitter_s * np.abs(rng.standard_normal(n))
        recv = _monotonic(recv, 0.0)
        keep = np.ones(n, bool)
        if spec.drop_probability > 0:
            keep = rng.random(n) >= spec.drop_probability
        padded = np.zeros((n, width), dtype=np.uint8)
        padded[:, : data.shape[1]] = data
        cols["t"].append(recv[keep])
        cols["id"].append(np.full(int(keep.sum()), cid, dtype=np.int64))
        cols["ext"].append(np.full(int(keep.sum()), bool(ext)))
        cols["dlc"].append(np.full(int(keep.sum()), dlc, dtype=np.int64))
        cols["data"].append(padded[keep])
        cols["kind"].append(np.full(int(keep.sum()), kind, dtype=np.int8))
    t = np.concatenate(cols["t"])
    order = np.argsort(t, kind="stable")
    gap = FRAME_BITS / float(ride.rig.can_bus.bitrate or 1_000_000)
    t = np.round(_monotonic(t[order], gap), 6)
    return CanFrames(
        t=t, can_id=np.concatenate(cols["id"])[order], extended=np.concatenate(cols["ext"])[order],
        dlc=np.concatenate(cols["dlc"])[order], data=np.concatenate(cols["data"])[order],
        kind=np.concatenate(cols["kind"])[order],
    )
