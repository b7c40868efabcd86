"""Keep frames whose receive times cannot be right away from the analysis.

:class:`FrameGuard` sits between a CAN source and the frame decoder. It looks at the receive
times of the whole bus (every id), because a CAN interface stamps frames in the order they
arrive: a frame stamped before its predecessor, or far after the frames around it, has a
wrong time, and the crank reconstruction would turn that wrong time into wrong angles.

* A time that is not a finite number: the frame is dropped (``can_bad_time``).
* A frame more than :data:`BACK_TOLERANCE_S` before the time line, or more than
  :data:`AHEAD_LIMIT_S` after it: held back. If the frames after it go on from the old time
  line, the held frames were stamped wrong: dropped (``can_out_of_order``). If
  :data:`CONFIRM_FRAMES` frames in a row go on from the held one instead, the clock itself
  stepped (``can_time_steps``): a step forward is taken as it is (a pause in the recording); a
  step back is taken out by shifting every later time forward, so that the time line goes on
  (the note says by how much).

The run's time line. A clock that steps back (a logger setting its clock from the network,
say) has not turned the ride back: the frames after the step were received after the frames
before it. So the run keeps one time line, the recording's stamps with every backward step
taken out, and everything the run reports and stores (events, channels, its span ``t_start``
.. ``t_end``) is on that line: after a step back of ``d`` s the run ends up to ``d`` s after the
recording's last stamp, and its length is how long the bike was recorded. Each shift is kept
in the stream health (``can_clock_shifts``: ``[time on the run's line from which it holds,
shift in s]``, stored with the run's summary) and :func:`log_stamps` maps the run's times back
to the recording's own stamps, to find a frame in the log.

Dropped frames are frames lost to the decoder: a message with a rolling counter sees the gap
and the crank reconstruction bridges it like any lost frame.
"""

from __future__ import annotations

import numpy as np

from crankbeat.logger.can.sources.base import FrameBatch, concat
from crankbeat.logger.chunks import StreamHealth

#: Frames stamped up to this much before their predecessor are let through (stamping jitter of
#: several channels merged into one log), s.
BACK_TOLERANCE_S = 1e-3
#: A frame this much after its predecessor with nothing in between is suspect, s.
AHEAD_LIMIT_S = 5.0
#: Frames in a row, consistent among themselves, that make a clock step (not a stray stamp).
CONFIRM_FRAMES = 50
#: Notes per kind; the counters keep counting.
NOTES_PER_KIND = 5


def take(b: FrameBatch, sel: np.ndarray) -> FrameBatch:
    """The frames ``sel`` (indices or mask) of a batch, as a new batch."""
    return FrameBatch(ts=b.ts[sel], can_id=b.can_id[sel], extended=b.extended[sel],
                      dlc=b.dlc[sel], data=b.data[sel], is_error=b.is_error[sel],
                      is_remote=b.is_remote[sel], is_fd=b.is_fd[sel], index=b.index[sel],
                      origin=b.origin, index_kind=b.index_kind)


def log_stamps(t, shifts) -> np.ndarray:
    """Times on a run's time line mapped back to the recording's own stamps, s.

    Parameters
    ----------
    t : array_like
        Times on the run's time line (CAN time base, after the guard), s.
    shifts : sequence of (from_s, shift_s)
        The run's ``can_clock_shifts``: from time ``from_s`` on (run's line) every time was
        shifted forward by ``shift_s``; the shifts add up.

    Returns
    -------
    ndarray, shape of ``t``
    """
    t = np.asarray(t, dtype=np.float64)
    out = t.copy()
    for start, shift in shifts:
        out = np.where(t >= float(start), out - float(shift), out)
    return out


def _fits(t: float, last: float) -> bool:
    return last - BACK_TOLERANCE_S <= t <= last + AHEAD_LIMIT_S


class FrameGuard:
    """Drop frames with impossible receive times; take out backward clock steps.

    Parameters
    ----------
    health : StreamHealth
        Counters and notes are added here.

    Notes
    -----
    State: the time line's last time, the offset added after backward steps, and the frames
    held while it is not yet known whether they are stray stamps or a clock step (at most
    :data:`CONFIRM_FRAMES`). Clean batches pass in one vectorised check.
    """

    def __init__(self, health: StreamHealth) -> None:
        self.health = health
        self.offset = 0.0
        self._last: float | None = None
        self._held: FrameBatch | None = None
        self._noted: dict[str, int] = {}

    def _note(self, kind: str, text: str) -> None:
        k = self._noted.get(kind, 0)
        self._noted[kind] = k + 1
        if k < NOTES_PER_KIND:
            self.health.notes.append(text)

    def push(self, batch: FrameBatch) -> FrameBatch:
        """The frames of ``batch`` (and of earlier held ones) whose times can be trusted."""
        if not len(batch):
            return batch
        t = batch.ts + self.offset if self.offset else batch.ts
        if self._held is None and self._clean(t):
            self._last = float(t[-1])
            if self.offset:
                batch = take(batch, slice(None))
                batch.ts = t
            return batch
        work = batch if self._held is None else concat([self._held, batch])
        n_held = 0 if self._held is None else len(self._held)
        return self._slow(work, n_held)

    def _clean(self, t: np.ndarray) -> bool:
        if not np.isfinite(t).all():
            return False
        prev = np.empty_like(t)
        prev[0] = t[0] if self._last is None else self._last
        prev[1:] = t[:-1]
        d = t - prev
        return bool((d >= -BACK_TOLERANCE_S).all() and (d <= AHEAD_LIMIT_S).all())

    def _slow(self, b: FrameBatch, n_held: int) -> FrameBatch:
        """Frame by frame; frames ``[0, n_held)`` of ``b`` were held (already offset)."""
        h = self.health
        ts = b.ts.astype(np.float64, copy=True)
        ts[n_held:] += self.offset
        keep = np.zeros(len(b), bool)
        held: list[int] = list(range(n_held))
        last = self._last
        for i in range(n_held, len(b)):
            t = float(ts[i])
            if not np.isfinite(t):
                h.can_bad_time += 1
                self._note("bad_time", f"{b.where(i)}: receive time {b.ts[i]!r} is not a "
                           "finite number (frame skipped)")
                continue
            if last is None or _fits(t, last):
                if held:
                    self._drop_held(b, ts, held, last)
                    held = []
                keep[i] = True
                last = t
                continue
            if held and not _fits(t, float(ts[held[-1]])):
                self._drop_held(b, ts, held, last)
                held = []
            held.append(i)
            if len(held) >= CONFIRM_FRAMES:
                ts, last = self._step(b, ts, held, last)
                keep[held] = True
                held = []
        self._last = last
        self._held = take(b, np.array(held, np.int64)) if held else None
        if self._held is not None:
            self._held.ts = ts[held]
        out = take(b, keep)
        out.ts = ts[keep]
        return out

    def _drop_held(self, b: FrameBatch, ts: np.ndarray, held: list[int], last: float | None
                   ) -> None:
        self.health.can_out_of_order += len(held)
        i = held[0]
        off = float(ts[i]) - (last if last is not None else float(ts[i]))
        self._note("order", f"{b.where(i)}: stamped {off:+.6g} s off the frames around it "
                   f"({len(held)} frame(s) skipped)")

    def _step(self, b: FrameBatch, ts: np.ndarray, held: list[int], last: float | None
              ) -> tuple[np.ndarray, float]:
        """``held`` frames go on from each other, not from the time line: the clock stepped."""
        h = self.health
        h.can_time_steps += 1
        i = held[0]
        step = float(ts[i]) - (last if last is not None else float(ts[i]))
        if step < 0:
            spacing = float(np.median(np.diff(ts[held]))) if len(held) > 1 else 0.0
            shift = -step + max(spacing, 0.0)
            self.offset += shift
            ts[held[0]:] += shift
            h.can_clock_shifts.append([float(ts[i]), shift])
            self._note("step", f"{b.where(i)}: the clock steps back by {-step:.6g} s; later "
                       f"times are shifted by {shift:+.6g} s so that the time line goes on "
                       "(the run's times after it are the log's stamps plus the shift)")
        else:
            self._note("step", f"{b.where(i)}: the clock jumps ahead by {step:.6g} s "
                       "(taken as a pause in the recording)")
        return ts, float(ts[held[-1]])

    def finish(self) -> None:
        """End of stream: frames still held are too few to make a clock step: dropped."""
        if self._held is not None and len(self._held):
            self.health.can_out_of_order += len(self._held)
            self._note("order", f"{self._held.where(0)}: the last {len(self._held)} frame(s) "
                       "are stamped off the time line (skipped)")
        self._held = None
