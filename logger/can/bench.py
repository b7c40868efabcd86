"""Speed of CAN log reading: python-can's bare ``LogReader`` against our fast path.

``measure(n_frames)`` writes a candump log of M1-like frames (python-can's own writer) into a
temporary directory and times: python-can iterating it (nothing else), our numpy parser alone,
and the whole decode (parser + :class:`~logger.can.decode.FrameDecoder`). For the benchmark
(``make bench``); no test asserts on time.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import can
import numpy as np

from logger.can.bits import encode_signal
from logger.can.decode import FrameDecoder
from logger.can.sources import CandumpFastSource
from logger.rig.model import Rig


def write_log(path: Path, rig: Rig, n_frames: int, *, t0: float = 1_767_225_600.0) -> None:
    """An M1-like mix: one status frame per 20 tooth frames, steady 4000 rpm-ish periods."""
    teeth = rig.message_for("tooth_periods")
    status = rig.message_for("engine_speed")
    rng = np.random.default_rng(0)
    n_status = n_frames // 21
    n_teeth = n_frames - n_status
    td = np.zeros((n_teeth, teeth.length), np.uint8)
    sig = teeth.signal_for("tooth_periods")
    encode_signal(250e-6 * (1 + 0.02 * rng.standard_normal((n_teeth, sig.count))), sig, td)
    encode_signal(np.arange(n_teeth) % 256, teeth.signal_for("counter"), td)
    sd = np.zeros((n_status, status.length), np.uint8)
    encode_signal(4000.0, status.signal_for("engine_speed"), sd)
    encode_signal(np.arange(n_status) % 256, status.signal_for("counter"), sd)
    t = t0 + np.arange(n_frames) * 1e-4
    is_status = np.zeros(n_frames, bool)
    is_status[::21] = True
    is_status[np.flatnonzero(is_status)[n_status:]] = False
    it_t, it_s = iter(td), iter(sd)
    with can.CanutilsLogWriter(str(path)) as w:
        for i in range(n_frames):
            if is_status[i]:
                d, cid = next(it_s), status.can_id
            else:
                d, cid = next(it_t), teeth.can_id
            w.on_message_received(can.Message(timestamp=float(t[i]), arbitration_id=cid,
                                              is_extended_id=False, data=bytes(d)))


def _best(fn, repeat: int) -> float:
    """Shortest of ``repeat`` runs, s (the machine is shared; the minimum is the least noisy)."""
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def measure(rig: Rig, n_frames: int = 1_000_000, *, repeat: int = 3) -> dict[str, float]:
    """Frames per second of: python-can's LogReader, our parser, our parser + decoder."""
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "bench.log"
        write_log(path, rig, n_frames)
        counts = []

        def reference():
            counts.append(sum(1 for _ in can.LogReader(str(path))))

        def parse():
            with CandumpFastSource(path) as src:
                counts.append(sum(len(b) for b in src.batches()))

        def whole():
            dec = FrameDecoder(rig)
            with CandumpFastSource(path) as src:
                for b in src.batches():
                    dec.push(b)
            counts.append(dec.health.can_frames)

        ref, fast, full = (_best(f, repeat) for f in (reference, parse, whole))
    assert set(counts) == {n_frames}
    return {
        "frames": float(n_frames),
        "python_can_fps": n_frames / ref,
        "fast_parse_fps": n_frames / fast,
        "fast_decode_fps": n_frames / full,
        "speedup_decode": ref / full,
    }
