"""The simulated accelerometer boards as the bytes a host reads from their ports, and when.

Each sample becomes one frame of the sensor's layout (:func:`logger.serial.frames.encode_frames`),
sent over the UART just after it is taken. The host reads the port in chunks (USB latency: a read
returns every ``chunk_ms`` with whatever arrived, stamped with a jittered host time on the CAN
clock). Faults of the scenario: frames with a corrupted byte, runs of lost bytes, and a stream
that starts in the middle of a frame.
"""

from __future__ import annotations

import numpy as np

from crankbeat.logger.serial.frames import encode_frames

_INT_RANGE = {"i8": (-128, 127), "u8": (0, 255), "i16": (-32768, 32767), "u16": (0, 65535),
              "i32": (-(2**31), 2**31 - 1), "u32": (0, 2**32 - 1)}
PROCESSING_S = 50e-6  # from sampling to the first byte on the wire


def accel_counts(sensor, xyz: np.ndarray) -> np.ndarray:
    """g → raw counts of the sensor's accel fields (rounded, clipped to the field's range)."""
    out = np.empty(xyz.shape, dtype=np.int64)
    for k, role in enumerate(("accel_x", "accel_y", "accel_z")):
        f = sensor.field_for(role)
        lo, hi = _INT_RANGE[f.dtype]
        out[:, k] = np.clip(np.rint(xyz[:, k] / f.scale), lo, hi)
    return out


def stream(ride, sensor_name: str) -> list[tuple[float, bytes]]:
    """The host's reads of one sensor's port: ``[(host_time, data), ...]`` in time order."""
    sensor = ride.rig.sensor(sensor_name)
    acc = ride.accel[sensor_name]
    spec = ride.scenario.serial
    idx = [s.name for s in ride.rig.sensors].index(sensor_name)
    rng = np.random.default_rng([*ride.seeds["serial"].generate_state(2), idx])
    data = encode_frames(sensor, acc.seq, acc.device_raw, accel_counts(sensor, acc.xyz))
    raw = np.frombuffer(data, dtype=np.uint8).copy()
    n, flen = len(acc.t), sensor.frame_length
    byte_time = 1.0 / (sensor.baud / 10.0)  # 8N1: ten bit times per byte
    frame_t = acc.t + PROCESSING_S
    t_bytes = (frame_t[:, None] + byte_time * (1 + np.arange(flen))[None, :]).ravel()
    keep = np.ones(n * flen, dtype=bool)
    if spec.corrupt_probability > 0:
        hit = np.flatnonzero(rng.random(n) < spec.corrupt_probability)
        pos = hit * flen + rng.integers(0, flen, len(hit))
        raw[pos] ^= rng.integers(1, 256, len(hit)).astype(np.uint8)
    if spec.lost_probability > 0:
        hit = np.flatnonzero(rng.random(n) < spec.lost_probability)
        for h, run in zip(hit, rng.integers(1, 2 * flen, len(hit))):
            start = h * flen + int(rng.integers(0, flen))
            keep[start : start + int(run)] = False
    keep[: max(0, spec.start_offset)] = False
    raw, t_bytes = raw[keep], t_bytes[keep]
    lo_ms, hi_ms = spec.chunk_ms
    span = float(t_bytes[-1] - ride.start_time) + 0.1 if len(t_bytes) else 0.1
    m = int(span / (0.5 * (lo_ms + hi_ms) * 1e-3)) + 64
    reads = ride.start_time + np.cumsum(rng.uniform(lo_ms, hi_ms, m) * 1e-3)
    reads = reads[: int(np.searchsorted(reads, t_bytes[-1])) + 1] if len(t_bytes) else reads[:0]
    cut = np.searchsorted(t_bytes, reads, side="right")
    stamps = reads + spec.arrival_jitter_ms * 1e-3 * np.abs(rng.standard_normal(len(reads)))
    stamps = np.maximum.accumulate(stamps)
    out = []
    prev = 0
    for c, ts in zip(cut.tolist(), stamps.tolist()):
        if c > prev:
            out.append((ts, raw[prev:c].tobytes()))
            prev = c
    return out
