"""A live CAN bus through python-can: any interface it supports (socketcan, virtual, ...).

Frames are read with ``recv(0)``, with short naps while none is queued; a batch ends when
``max_frames`` arrived, after ``max_batch_s``, or when the bus has been quiet for ``timeout``
seconds, so a caller gets control back at least that often (to check a stop flag) even when
nothing arrives — then the batch is empty.

Receive times are rounded to ``resolution_s`` (1 µs, what a candump log keeps) so that the
recording of a live run replays to exactly the same numbers.
"""

from __future__ import annotations

import time
from collections.abc import Iterator

import can
import numpy as np

from crankbeat.errors import SourceError
from crankbeat.logger.can.sources.base import CanSource, FrameBatch
from crankbeat.logger.rig.model import CanBus

#: Longest nap of the reading thread while the bus's queue is empty, s.
NAP_S = 0.005


def candump_microseconds(ts: np.ndarray) -> np.ndarray:
    """Exactly what a candump writer's ``"%f"`` and a reader's ``float()`` make of each time, s.

    Vectorised where it is exact: for 2**19 <= t < 8e9 s (any epoch time) the fraction ``t -
    floor(t)`` has at most 33 significant bits, so ``fraction * 1e6`` is exact, ``rint`` rounds
    half to even as the formatting does, and one division of the exact integer count of
    microseconds by 1e6 is correctly rounded, like ``float()`` of the decimal string. Other
    times go through the strings.
    """
    ts = np.asarray(ts, dtype=float)
    out = np.empty_like(ts)
    ok = (ts >= 2.0**19) & (ts < 8e9)
    whole = np.floor(ts[ok])
    micro = np.rint((ts[ok] - whole) * 1e6)
    out[ok] = (whole * 1e6 + micro) / 1e6
    out[~ok] = [float(f"{t:f}") for t in ts[~ok]]
    return out


class BusSource(CanSource):
    """Frames from a live python-can bus.

    Parameters
    ----------
    bus : CanBus or can.BusABC
        Where the bus is (opened here with ``can.Bus(interface=, channel=, bitrate=)``), or an
        already open python-can bus (not shut down by :meth:`close`).
    timeout : float
        Longest wait for a frame before an (possibly empty) batch is handed back, s.
    resolution_s : float or None
        Receive times are rounded to this step; None keeps them as the interface gives them.
    max_batch_s : float
        A batch is also handed back after this much wall time, however busy the bus.
    """

    def __init__(
        self,
        bus: CanBus | can.BusABC,
        *,
        timeout: float = 0.05,
        resolution_s: float | None = 1e-6,
        max_batch_s: float = 0.05,
    ) -> None:
        super().__init__()
        if isinstance(bus, can.BusABC):
            self.bus = bus
            self._owns = False
            self.origin = f"bus {bus.channel_info}"
        else:
            kwargs: dict[str, object] = {"interface": bus.interface, "channel": bus.channel}
            if bus.interface != "virtual":
                kwargs["bitrate"] = bus.bitrate
            if bus.fd:
                kwargs["fd"] = True
            try:
                self.bus = can.Bus(**kwargs)
            except (can.CanError, OSError, ValueError, ImportError) as exc:
                raise SourceError(f"CAN bus {bus.interface}:{bus.channel}: cannot open "
                                  f"({exc})") from None
            self._owns = True
            self.origin = f"bus {bus.interface}:{bus.channel}"
        self.timeout = float(timeout)
        self.max_batch_s = float(max_batch_s)
        self.resolution_s = resolution_s
        self.frames_read = 0
        self._closed = False

    def _quantise(self, ts: np.ndarray) -> np.ndarray:
        if self.resolution_s is None:
            return ts
        if self.resolution_s == 1e-6:
            return candump_microseconds(ts)
        return np.round(ts / self.resolution_s) * self.resolution_s

    def recv_batch(self, max_frames: int = 65536) -> FrameBatch:
        """One batch: what arrives until ``max_frames``, a quiet ``timeout``, or ``max_batch_s``.

        The queue is drained without blocking and the thread naps :data:`NAP_S` when it is
        empty: a blocking read per frame wakes the thread for every frame (thousands a second
        at high rpm), and a batch is handed on only at its end anyway. The frames' times are
        the bus's receive stamps, so the naps change no number, only when a frame is read
        (at most one nap later, inside a batch that waits for its ``max_batch_s`` anyway).
        """
        msgs: list[can.Message] = []
        now = time.monotonic()
        deadline = now + self.max_batch_s
        heard = now  # last time a frame was read (or the start)
        while len(msgs) < max_frames:
            try:
                msg = self.bus.recv(timeout=0.0)
            except (can.CanError, OSError) as exc:
                raise SourceError(f"{self.origin}: receive failed ({exc})") from None
            now = time.monotonic()
            if msg is not None:
                msgs.append(msg)
                heard = now
                if now > deadline:
                    break
                continue
            if now >= deadline or now - heard >= self.timeout:
                break
            time.sleep(min(NAP_S, deadline - now, heard + self.timeout - now))
        first = self.frames_read
        self.frames_read += len(msgs)
        batch = FrameBatch.from_messages(msgs, range(first, first + len(msgs)),
                                         origin=self.origin, index_kind="frame")
        batch.ts = self._quantise(batch.ts)
        return batch

    def batches(self, max_frames: int = 65536) -> Iterator[FrameBatch]:
        """Endless batches (empty ones when the bus is quiet) until :meth:`close`."""
        while not self._closed:
            yield self.recv_batch(max_frames)

    def close(self) -> None:
        self._closed = True
        if self._owns:
            self.bus.shutdown()
