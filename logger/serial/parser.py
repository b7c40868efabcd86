"""Find, check and decode sensor frames in a raw serial byte stream, fast.

:class:`SerialFrameParser` takes the bytes of successive port reads (each with its host arrival
time) and returns the frames that completed in them. It never loops over bytes in Python:

1. all positions where the sync bytes occur are found with numpy comparisons over the buffer;
2. every candidate that has a whole frame after it is gathered into an ``(k, L)`` array and its
   checksum is checked in one vectorised pass;
3. overlaps are resolved greedily from the left: a candidate is accepted when its checksum
   passes and it starts at or after the end of the previous accepted frame. Only candidates that
   overlap another passing candidate (rare: a chance checksum match) reach a Python loop.

Because every sync position is a candidate, a failed frame does not hide a real frame that
starts inside it: the search continues from the next byte after the failed sync. The bytes
that cannot be judged yet (fewer than a frame after the last decided position) are carried into
the next push, so a frame split across port reads is found, and the result does not depend on
how the stream was cut into reads.

A zero-length record is a link break (the adapter was pulled and reopened): the carried bytes
are dropped and the next frame is marked ``break_before``.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from crankbeat.errors import InputError
from crankbeat.logger.rig.model import SerialSensor
from crankbeat.logger.serial.frames import FrameLayout


@dataclass
class ParsedFrames:
    """Frames decoded from a stretch of the stream, in stream order.

    Attributes
    ----------
    seq : (n,) int64
        Sequence number, unwrapped (keeps counting past the field's modulo). Estimated from the
        device clock when the board has no sequence field.
    device_t : (n,) float64
        Device clock, unwrapped, s. From the sequence and the sample rate when the board has no
        clock field.
    accel : (n, 3) float64
        Acceleration in g, sensor axes x, y, z.
    host_time : (n,) float64
        Host arrival time of the port read in which each frame completed, s.
    lost_before : (n,) int64
        Frames missing just before this one (sequence gap; estimated from host time after a
        clock discontinuity).
    break_before : (n,) bool
        The link broke or the device clock jumped just before this frame.
    last_in_read : (n,) bool
        This frame is the last one completed in its port read (the clock aligner's pairs).
    """

    seq: np.ndarray
    device_t: np.ndarray
    accel: np.ndarray
    host_time: np.ndarray
    lost_before: np.ndarray
    break_before: np.ndarray
    last_in_read: np.ndarray

    def __len__(self) -> int:
        return len(self.seq)

    @classmethod
    def empty(cls) -> ParsedFrames:
        return cls(
            np.zeros(0, np.int64), np.zeros(0), np.zeros((0, 3)), np.zeros(0),
            np.zeros(0, np.int64), np.zeros(0, bool), np.zeros(0, bool),
        )

    @classmethod
    def concat(cls, parts: Sequence[ParsedFrames]) -> ParsedFrames:
        parts = [p for p in parts if len(p)]
        if not parts:
            return cls.empty()
        if len(parts) == 1:
            return parts[0]
        return cls(*(np.concatenate([getattr(p, n) for p in parts]) for n in _FIELDS))


#: Longest gap a board restart is taken to span when estimating the frames lost in it, s.
MAX_GAP_S = 3600.0

_FIELDS = ("seq", "device_t", "accel", "host_time", "lost_before", "break_before", "last_in_read")


@dataclass
class FrameCounts:
    """Cumulative counters of one sensor's stream (the parser's and, as
    :class:`~logger.serial.decoder.SerialHealth`, the decoder's: one set of counters).

    ``corrupt`` counts sync positions outside accepted frames whose checksum failed; ``lost``
    counts frames missing from the sequence (bounded by what :data:`MAX_GAP_S` of samples can
    hold); ``skipped`` counts bytes that belong to no accepted frame (noise, damaged frames,
    bytes dropped at a link break); ``breaks`` counts link breaks (``reconnects``),
    ``clock_jumps`` device clock discontinuities and ``host_steps`` steps of the host clock
    (device clock and sequence run on, the host's arrival times jump). ``bad_records`` and
    ``bytes_lost`` are filled by whoever reads a capture file (records skipped, bytes skipped
    while finding the next record).
    """

    good: int = 0
    corrupt: int = 0
    lost: int = 0
    skipped: int = 0
    breaks: int = 0
    clock_jumps: int = 0
    host_steps: int = 0
    bad_records: int = 0
    bytes_lost: int = 0

    @property
    def reconnects(self) -> int:
        """Link breaks (adapter pulled, queue overflow): the same count as ``breaks``."""
        return self.breaks


class SerialFrameParser:
    """Streaming frame finder and decoder for one sensor.

    Parameters
    ----------
    sensor : SerialSensor
        The board's description; any sync, field list, checksum kind and frame length.
    max_clock_step_s : float, optional
        Largest plausible disagreement between the device clock's and the host clock's elapsed
        time from one frame to the next, s. Beyond it the device clock is taken to have jumped
        (the board reset): the frame is marked ``break_before`` and the unwrapped clock is
        rebased on the host's elapsed time. Default 2 s (longer than any USB stall that does
        not also overflow the driver's buffer).

    Notes
    -----
    Memory is bounded: at most ``frame_length - 1`` bytes are carried between pushes.
    """

    def __init__(self, sensor: SerialSensor, *, max_clock_step_s: float = 2.0) -> None:
        self.sensor = sensor
        self.layout = FrameLayout(sensor)
        if not max_clock_step_s > 0:
            raise InputError(
                f"max_clock_step_s must be a positive time in s, got {max_clock_step_s!r}"
            )
        self.max_clock_step_s = float(max_clock_step_s)
        self.counts = FrameCounts()
        self._L = sensor.frame_length
        self._sync = np.frombuffer(sensor.sync, dtype=np.uint8)
        self._seq_field = sensor.field_for("sequence")
        self._dev_field = sensor.field_for("device_time")
        self._rate = float(sensor.sample_rate_hz)
        self._carry = np.zeros(0, dtype=np.uint8)
        self._pending_break = False
        self._host_offset = 0.0  # host clock steps taken out so far, s
        self.host_step_s: list[float] = []  # each host clock step found, s
        # Unwrap state: previous frame's raw values, unwrapped values and host time.
        # seq_raw, dev_raw, seq, dev, host
        self._prev: tuple[int, int, int, int, float] | None = None

    # -- public ---------------------------------------------------------------------------
    @property
    def good(self) -> int:
        return self.counts.good

    @property
    def corrupt(self) -> int:
        return self.counts.corrupt

    @property
    def lost(self) -> int:
        return self.counts.lost

    @property
    def skipped(self) -> int:
        """Bytes that belong to no accepted frame."""
        return self.counts.skipped

    def push(self, data: bytes, host_time: float) -> ParsedFrames:
        """Frames that complete in ``data`` (one port read that arrived at ``host_time`` s).

        Empty ``data`` is a link-break marker (see the module docstring), not a no-op.
        """
        return self.push_records([(host_time, data)])

    def push_records(self, records: Iterable[tuple[float, bytes]]) -> ParsedFrames:
        """Frames that complete in a run of port reads ``[(host_time, bytes), ...]``.

        Gives exactly what pushing the reads one at a time gives, faster.
        """
        parts: list[ParsedFrames] = []
        run_t: list[float] = []
        run_b: list[bytes] = []
        for t, data in records:
            if len(data) == 0:
                if run_b:
                    parts.append(self._process(run_t, run_b))
                    run_t, run_b = [], []
                self.break_link()
                continue
            run_t.append(float(t))
            run_b.append(bytes(data))
        if run_b:
            parts.append(self._process(run_t, run_b))
        return ParsedFrames.concat(parts)

    def break_link(self) -> None:
        """The link broke: drop the carried bytes; the next frame gets ``break_before``."""
        self.counts.skipped += len(self._carry)
        self._carry = np.zeros(0, dtype=np.uint8)
        self.counts.breaks += 1
        self._pending_break = True

    # -- internals ------------------------------------------------------------------------
    def _process(self, times: list[float], chunks: list[bytes]) -> ParsedFrames:
        L = self._L
        carry_n = len(self._carry)
        new = np.frombuffer(b"".join(chunks), dtype=np.uint8)
        buf = np.concatenate([self._carry, new]) if carry_n else new
        N = len(buf)
        ends = carry_n + np.cumsum([len(c) for c in chunks])  # one past each read's last byte
        m = N - L + 1  # candidate positions 0..m-1 have a whole frame after them
        if m <= 0:
            self._carry = buf.copy()
            return ParsedFrames.empty()

        cand = self._sync_positions(buf, m)
        frames = buf[cand[:, None] + np.arange(L)] if len(cand) else np.zeros((0, L), np.uint8)
        ok = self.layout.checksum_ok(frames)
        accepted = self._resolve(cand[ok])
        acc_pos = cand[ok][accepted]
        acc_frames = frames[ok][accepted]

        failed = cand[~ok]
        if len(failed) and not len(acc_pos):
            self.counts.corrupt += len(failed)
        elif len(failed):
            j = np.searchsorted(acc_pos, failed, side="right") - 1
            inside = (j >= 0) & (failed < acc_pos[np.maximum(j, 0)] + L)
            self.counts.corrupt += int(np.count_nonzero(~inside))

        last_end = int(acc_pos[-1]) + L if len(acc_pos) else 0
        decided = max(last_end, m)
        self.counts.skipped += decided - L * len(acc_pos)
        self.counts.good += len(acc_pos)
        self._carry = buf[decided:].copy()

        read_idx = np.searchsorted(ends, acc_pos + L - 1, side="right")
        host = np.asarray(times, dtype=np.float64)[read_idx]
        last_in_read = np.ones(len(acc_pos), dtype=bool)
        last_in_read[:-1] = read_idx[1:] != read_idx[:-1]
        return self._decode(acc_frames, host, last_in_read)

    def _sync_positions(self, buf: np.ndarray, m: int) -> np.ndarray:
        if len(self._sync) == 0:
            return np.arange(m)
        mask = buf[:m] == self._sync[0]
        for k in range(1, len(self._sync)):
            mask &= buf[k : k + m] == self._sync[k]
        return np.flatnonzero(mask)

    def _resolve(self, pos: np.ndarray) -> np.ndarray:
        """Greedy left-to-right choice among passing candidates: a boolean mask over ``pos``."""
        L = self._L
        keep = np.ones(len(pos), dtype=bool)
        if len(pos) < 2:
            return keep
        clash = np.diff(pos) < L
        if not clash.any():
            return keep
        involved = np.zeros(len(pos), dtype=bool)
        involved[:-1] |= clash
        involved[1:] |= clash
        # A clash group starts at least a frame after any accepted frame before it, so the
        # groups can be resolved one after the other with a single running end.
        end = -1
        for i in np.flatnonzero(involved):
            p = int(pos[i])
            if p >= end:
                end = p + L
            else:
                keep[i] = False
        return keep

    def _clock_turns_across_break(self, d_dev: np.ndarray, d_host_s: float) -> np.ndarray:
        """The first frame after a link break: a short device clock (a u16 of 10 µs turns in
        0.66 s) may have wrapped while the adapter was out; its whole turns come from the
        host's elapsed time (the sequence's turns then follow from the clock). Only here:
        after a reopen pyserial hands over fresh bytes, so both host times are within a
        read's latency of their samples (within a running link a USB stall delays reads
        without losing frames, and host time would invent turns)."""
        m = self.sensor.device_time_modulo
        span = m * self.sensor.device_time_unit_s
        elapsed = min(max(d_host_s, 0.0), MAX_GAP_S)
        turns = max(int(round((elapsed - int(d_dev[0]) * self.sensor.device_time_unit_s)
                              / span)), 0)
        out = d_dev.astype(np.int64, copy=True)
        out[0] += turns * m
        return out

    def _turns_across_break(self, d_seq: np.ndarray, d_host_s: float) -> np.ndarray:
        """As :meth:`_clock_turns_across_break`, for a board with a sequence but no clock: the
        sequence's whole turns while the adapter was out come from the host's elapsed time."""
        m = self.sensor.sequence_modulo
        expect = min(max(d_host_s, 0.0), MAX_GAP_S) * self._rate
        turns = max(int(round((expect - int(d_seq[0])) / m)), 0)
        out = d_seq.astype(np.int64, copy=True)
        out[0] += turns * m
        return out

    def _decode(self, frames: np.ndarray, host: np.ndarray, last: np.ndarray) -> ParsedFrames:
        n = len(frames)
        if n == 0:
            return ParsedFrames.empty()
        s = self.sensor
        rate = self._rate
        unit = s.device_time_unit_s
        seq_raw = self.layout.field_raw(frames, self._seq_field) if self._seq_field else None
        dev_raw = self.layout.field_raw(frames, self._dev_field) if self._dev_field else None

        prev = self._prev
        if prev is None:
            first_seq = int(seq_raw[0]) if seq_raw is not None else 0
            first_dev = int(dev_raw[0]) if dev_raw is not None else 0
            prev = (first_seq, first_dev, first_seq, first_dev, float(host[0]))
            d_first_zero = True
        else:
            d_first_zero = False
        p_seq_raw, p_dev_raw, p_seq, p_dev, p_host = prev
        host = host - self._host_offset
        d_host = np.diff(host, prepend=p_host)

        across_break = self._pending_break and not d_first_zero
        if dev_raw is not None:
            d_dev = np.diff(dev_raw, prepend=p_dev_raw) % s.device_time_modulo
            if across_break:
                d_dev = self._clock_turns_across_break(d_dev, float(d_host[0]))
        if seq_raw is not None:
            d_seq = np.diff(seq_raw, prepend=p_seq_raw) % s.sequence_modulo
            if dev_raw is not None:
                # A gap longer than half the sequence range wraps it ambiguously: the device
                # clock says how many whole turns were missed.
                expect = d_dev * unit * rate
                far = expect > s.sequence_modulo / 2
                if far.any():
                    turns = np.round((expect[far] - d_seq[far]) / s.sequence_modulo)
                    d_seq[far] += np.maximum(turns, 0).astype(np.int64) * s.sequence_modulo
            elif across_break:
                d_seq = self._turns_across_break(d_seq, float(d_host[0]))
        elif dev_raw is not None:
            d_seq = np.maximum(np.round(d_dev * unit * rate), 1).astype(np.int64)
        else:
            d_seq = np.ones(n, dtype=np.int64)
        if dev_raw is None:
            d_dev_s = d_seq / rate
        else:
            d_dev_s = d_dev * unit

        brk = np.zeros(n, dtype=bool)
        if dev_raw is not None:
            brk = np.abs(d_dev_s - d_host) > self.max_clock_step_s
        if d_first_zero:
            d_seq[0] = 0
            d_dev_s = d_dev_s.copy()
            d_dev_s[0] = 0.0
            brk[0] = False
        host_step = np.zeros(n, dtype=bool)
        if brk.any() and seq_raw is not None:
            # The sequence goes on by one and the device clock by one sample: the board is
            # fine, the host clock stepped. The device clock says how much time really
            # passed: later host times are taken back by the step, the clock fit goes on.
            host_step = brk & (d_seq == 1) & (np.abs(d_dev_s * rate - 1) < 0.5)
            if host_step.any():
                step = np.cumsum(np.where(host_step, d_host - d_dev_s, 0.0))
                host = host - step
                self._host_offset += float(step[-1])
                self.host_step_s.extend((d_host - d_dev_s)[host_step].tolist())
                self.counts.host_steps += int(np.count_nonzero(host_step))
                brk = brk & ~host_step
        jump = brk
        if jump.any():
            # The board restarted (or its clock jumped): carry on from the host's elapsed time,
            # bounded (a host time far off cannot make billions of lost frames).
            gap = np.clip(d_host[jump], 0.0, MAX_GAP_S)
            est = np.maximum(np.round(gap * rate), 1).astype(np.int64)
            d_seq[jump] = est
            d_dev_s = d_dev_s.copy()
            d_dev_s[jump] = est / rate
            self.counts.clock_jumps += int(np.count_nonzero(jump))
        lost = np.maximum(d_seq - 1, 0)
        if d_first_zero:
            lost[0] = 0
        self.counts.lost += int(lost.sum())

        seq = p_seq + np.cumsum(d_seq)
        # Device time kept in raw ticks while unwrapping so that no rounding creeps in.
        if dev_raw is not None:
            d_ticks = d_dev.copy()
            if d_first_zero:
                d_ticks[0] = 0
            if jump.any():
                d_ticks[jump] = np.round(d_dev_s[jump] / unit).astype(np.int64)
            ticks = p_dev + np.cumsum(d_ticks)
            device_t = ticks * unit
            last_dev = int(ticks[-1])
        else:
            device_t = seq / rate
            last_dev = int(seq[-1])
        if self._pending_break:
            brk = brk.copy()
            brk[0] = True
            self._pending_break = False
        self._prev = (
            int(seq_raw[-1]) if seq_raw is not None else 0,
            int(dev_raw[-1]) if dev_raw is not None else 0,
            int(seq[-1]),
            last_dev,
            float(host[-1]),
        )
        return ParsedFrames(
            seq=seq.astype(np.int64),
            device_t=np.asarray(device_t, dtype=np.float64),
            accel=self.layout.accel_g(frames),
            host_time=host,
            lost_before=lost.astype(np.int64),
            break_before=brk,
            last_in_read=last,
        )


def parse_stream(
    sensor: SerialSensor, records: Iterable[tuple[float, bytes]], **options
) -> tuple[ParsedFrames, FrameCounts]:
    """Whole-stream form of :class:`SerialFrameParser`: every frame of ``records`` at once.

    Gives the same numbers as pushing the records in any grouping; ``options`` are the parser's.
    """
    parser = SerialFrameParser(sensor, **options)
    return parser.push_records(records), parser.counts
