"""Does the input hold something the rig can analyse, and where was the analysis blind?

:class:`RunWatch` follows one run's chunks and final events (no I/O):

* it counts the crank-tooth frames the rig decoded; a run without any is not stored, and
  :meth:`RunWatch.require_analysable` raises :class:`~crankbeat.errors.DataError` with one line
  saying what the input held instead (frames and ids, read again from the log only then);
* it finds the breaks of every accelerometer that streamed (a reconnect, a long silence, a board
  that started late or stopped early) and counts the events judged inside them: those events
  had no rough-road check, which the run's notes must say.

Memory stays bounded: events wait here only until every accelerometer has reported past them
(the aligner's look-ahead, a second or two), and only the breaks are kept.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from crankbeat.errors import DataError, SourceError
from crankbeat.logger.chunks import Chunk
from crankbeat.logger.rig.model import Rig

#: A pause between two accelerometer samples longer than this many sample periods is a break.
BREAK_PERIODS = 5
#: ... and at least this long, s (a few late samples are not a break).
BREAK_MIN_S = 0.1
#: Events this long before a board's first sample, or after its last, count as without it, s.
EDGE_SLACK_S = 0.5
#: Event times held while waiting for the accelerometers (bounds memory if a board never comes).
MAX_PENDING = 200_000


@dataclass
class AccelBreak:
    """Accelerometer samples missing between ``t_from`` and ``t_to`` (CAN time, s)."""

    sensor: str
    t_from: float
    t_to: float
    samples_missing: int
    events: int = 0  # events judged inside it (no rough-road check)

    def as_dict(self) -> dict:
        return {"sensor": self.sensor, "t_from": self.t_from, "t_to": self.t_to,
                "seconds": self.t_to - self.t_from, "samples_missing": self.samples_missing,
                "events": self.events}


@dataclass
class _Board:
    rate_hz: float
    first_t: float | None = None
    last_t: float = -np.inf
    breaks: list[AccelBreak] = field(default_factory=list)


class RunWatch:
    """Follows a run for the gate and for the decisive notes.

    Parameters
    ----------
    rig : Rig
        Gives the crank frame id and each sensor's sample rate.
    """

    def __init__(self, rig: Rig) -> None:
        self.rig = rig
        self.crank_frames = 0
        self.status_frames = 0
        self.events = 0
        self.first_event_t: float | None = None
        self.health = None
        self.events_without_accel = 0  # judged while a streaming accelerometer had no samples
        self._boards: dict[str, _Board] = {}
        self._rates = {s.name: float(s.sample_rate_hz) for s in rig.sensors}
        self._pending: list[np.ndarray] = []  # event times not yet covered by every board

    # -- following ---------------------------------------------------------------------
    def push(self, chunk: Chunk, events: np.ndarray) -> None:
        """One chunk of the stream and the events it made final."""
        self.crank_frames += len(chunk.teeth)
        self.status_frames += len(chunk.status)
        self.health = chunk.health
        for name, block in chunk.accel.items():
            if len(block):
                self._take_accel(name, block.t, block.gap_before)
        self._take_events(events)
        self._settle(final=False)

    def finish(self, events: np.ndarray) -> None:
        """The events of the analysis's finish; events past a board's last sample are blind."""
        self._take_events(events)
        self._settle(final=True)

    def _take_accel(self, name: str, t: np.ndarray, gap_before: np.ndarray) -> None:
        board = self._boards.get(name)
        if board is None:
            board = self._boards[name] = _Board(self._rates.get(name, np.nan))
        t = np.asarray(t, float)
        if board.first_t is None:
            board.first_t = float(t[0])
            if self.first_event_t is not None and self.first_event_t < t[0] - EDGE_SLACK_S:
                self._add_break(name, board, self.first_event_t, float(t[0]))
        prev = np.r_[board.last_t, t[:-1]]
        longest = max(BREAK_MIN_S, BREAK_PERIODS / board.rate_hz) if board.rate_hz > 0 \
            else BREAK_MIN_S
        cut = np.isfinite(prev) & ((t - prev > longest) | (np.asarray(gap_before, bool)
                                                           & (t - prev > BREAK_MIN_S)))
        for a, b in zip(prev[cut].tolist(), t[cut].tolist(), strict=True):
            self._add_break(name, board, a, b)
        board.last_t = max(board.last_t, float(t[-1]))

    def _add_break(self, name: str, board: _Board, a: float, b: float) -> None:
        missing = int(round((b - a) * board.rate_hz)) - 1 if board.rate_hz > 0 else 0
        board.breaks.append(AccelBreak(name, a, b, max(missing, 0)))

    def _take_events(self, events: np.ndarray) -> None:
        if not len(events):
            return
        t = np.asarray(events["t"], float)
        t = t[np.isfinite(t)]
        self.events += len(events)
        if t.size:
            if self.first_event_t is None:
                self.first_event_t = float(t.min())
            self._pending.append(t)

    def _settle(self, *, final: bool) -> None:
        if not self._pending:
            return
        t = np.concatenate(self._pending)
        if not self._boards:  # no accelerometer streamed (yet): nothing to be blind to
            self._pending = [] if final else [t[-MAX_PENDING:]]
            return
        covered = min(b.last_t for b in self._boards.values())
        done = t if final else t[t <= covered]
        self._pending = [] if final else [t[t > covered][-MAX_PENDING:]]
        if not done.size:
            return
        blind = np.zeros(done.size, bool)
        for name, board in self._boards.items():
            if final and done.max() > board.last_t + EDGE_SLACK_S:
                self._add_break(name, board, board.last_t, float(done.max()))
                board.breaks[-1].samples_missing = 0  # the board stopped: not a counted loss
            for br in board.breaks:
                inside = (done > br.t_from) & (done < br.t_to)
                br.events += int(inside.sum())
                blind |= inside
        self.events_without_accel += int(blind.sum())

    # -- results -----------------------------------------------------------------------
    @property
    def breaks(self) -> list[AccelBreak]:
        return [br for b in self._boards.values() for br in b.breaks]

    def require_analysable(self, origin: str | os.PathLike, *,
                           census: Callable[[], Mapping[int, int]] | None = None) -> None:
        """Raise :class:`DataError` (one line) when no crank frame was decoded.

        ``origin`` names the input (the CAN log's path, or the bus). ``census`` gives frames per
        CAN id when asked (read again from a log, or counted by a live bus); without it the
        stream's counters are used.
        """
        if self.crank_frames > 0:
            return
        raise DataError(describe_no_crank(self.rig, origin, census, self.health))


def crank_id_text(rig: Rig) -> str:
    msg = rig.message_for("tooth_periods")
    if msg is None:
        return "(the rig names no crank frame)"
    return f"0x{msg.can_id:08X}" if msg.extended else f"0x{msg.can_id:03X}"


def _n(x: int) -> str:
    return f"{x:,}".replace(",", " ")


def describe_no_crank(rig: Rig, origin, census=None, health=None) -> str:
    """One line: what the input held instead of the rig's crank frames."""
    crank = rig.message_for("tooth_periods")
    crank_key = None if crank is None else int(crank.can_id)
    counts: Mapping[int, int] | None = None
    if census is not None:
        try:
            counts = census()
        except (SourceError, OSError, ValueError):
            counts = None
    where = str(origin)
    if counts is None:
        frames = 0 if health is None else int(health.can_frames)
        if not frames:
            return f"{where}: no CAN frames{_size_text(origin)}: nothing to analyse"
        return (f"{where}: no crank frames for id {crank_id_text(rig)} among {_n(frames)} "
                f"frames: is this rig '{rig.name}'?")
    counts = dict(counts)
    errors = int(counts.pop(ERROR_FRAMES, 0))
    total = int(sum(counts.values()))
    if not total:
        if errors:
            return (f"{where}: only {_n(errors)} CAN error frame(s), no data frames: "
                    "nothing to analyse")
        return f"{where}: no CAN frames{_size_text(origin)}: nothing to analyse"
    on_crank = int(counts.get(crank_key, 0)) if crank_key is not None else 0
    if on_crank:
        expect = f"{crank.length} data bytes" if crank is not None else "its layout"
        return (f"{where}: {_n(on_crank)} frames of crank id {crank_id_text(rig)} but none "
                f"could be read as tooth periods (expected {expect}): check the rig file")
    others = len([k for k in counts if k != crank_key])
    return (f"{where}: no crank frames for id {crank_id_text(rig)} among {_n(total)} "
            f"frame{'s' if total != 1 else ''} of {others} other id{'s' if others != 1 else ''}"
            f": is this rig '{rig.name}'?")


def _size_text(origin) -> str:
    try:
        p = Path(origin)
        if p.is_file():
            size = p.stat().st_size
            return " (empty file)" if size == 0 else f" in {_n(size)} bytes"
    except (OSError, ValueError):
        pass
    return ""


#: Census key of the error frames (no CAN id is negative).
ERROR_FRAMES = -1


def log_census(path: str | os.PathLike) -> dict[int, int]:
    """Frames per CAN id in a log; error frames are counted under :data:`ERROR_FRAMES`."""
    from crankbeat.logger.can.sources import open_log

    counts: dict[int, int] = {}
    source = open_log(path)
    try:
        for batch in source.batches(65536):
            err = np.asarray(batch.is_error, bool)
            if err.any():
                counts[ERROR_FRAMES] = counts.get(ERROR_FRAMES, 0) + int(err.sum())
            ids = np.asarray(batch.can_id)[~err]
            if ids.size:
                u, n = np.unique(ids, return_counts=True)
                for k, c in zip(u.tolist(), n.tolist(), strict=True):
                    counts[k] = counts.get(k, 0) + c
    finally:
        source.close()
    return counts




@contextmanager
def settle_failed_run(store, run_id: int):
    """Leave no empty or half-made run behind when the analysis of ``run_id`` fails.

    Interrupted (Ctrl-C, SIGTERM) after events were stored: the run stays, marked
    ``interrupted`` (a later replay of the same files analyses them again). Any other failure,
    or an interruption before any event: the run is removed. On success, earlier runs of the
    same files that never completed are removed: this run replaces them.
    """
    try:
        yield
    except (KeyboardInterrupt, SystemExit):
        store.settle_interrupted(run_id)
        raise
    except BaseException:
        store.delete_run(run_id)
        raise
    store.delete_unfinished_twins(run_id)


__all__ = ["AccelBreak", "RunWatch", "describe_no_crank", "log_census", "settle_failed_run"]
