"""Store writes of a live ride that never hold the ride up.

The ride writes its events every chunk. When the store cannot take them - another program holds
its lock, the disk is full - a plain write would wait (10 s) and then end the ride, recording
included. :class:`BufferedStore` takes the same calls as the :class:`~logger.store.Store`, keeps
them in memory (bounded by :data:`MAX_ROWS` rows; beyond, the oldest events are dropped and
counted), and writes them all in one transaction at the next commit that succeeds, trying again
at growing intervals. ``state_line()`` says on screen what is waiting and why.

Even the run's own row waits: :meth:`BufferedStore.begin_run` returns a :class:`PendingRun`
that the queued writes carry and that gets its id at the first commit that succeeds, so a
store locked when the ride starts does not hold up the start of the recording.
"""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Callable

import numpy as np

#: Rows (events, spans, windows) kept in memory while the store cannot be written: about
#: 3 hours of a twin at 10 000 rpm (83 events/s), some 100 MB.
MAX_ROWS = 1_000_000
#: How long a live write waits for another program's lock before it is kept for later, s.
LIVE_BUSY_S = 0.05
#: Longest pause between two attempts, s.
MAX_RETRY_S = 5.0


class PendingRun:
    """The run of a live ride, whose row is written with the first commit that succeeds."""

    def __init__(self, begin: Callable[[], int]) -> None:
        self._begin = begin
        self.id: int | None = None

    def ensure(self) -> int:
        """Write the run's row (inside the caller's transaction) and return its id."""
        if self.id is None:
            self.id = int(self._begin())
        return self.id

    def __int__(self) -> int:
        if self.id is None:
            raise RuntimeError("the run was not written to the store yet")
        return self.id


class BufferedStore:
    """Write-behind for :meth:`add_events`, :meth:`mask_events`, :meth:`add_windows`.

    Parameters
    ----------
    store : Store
        The open store (its lock wait is shortened to :data:`LIVE_BUSY_S` until :meth:`close`).
    max_rows : int
        Memory bound of what waits.
    """

    def __init__(self, store, *, max_rows: int = MAX_ROWS) -> None:
        self.store = store
        self.max_rows = int(max_rows)
        self._ops: list[tuple[Callable, tuple, dict, int]] = []
        self.run: PendingRun | None = None
        self.pending_rows = 0
        self.dropped_rows = 0
        self.failures = 0
        self.failed_since: float | None = None  # monotonic
        self.last_error: str | None = None
        self.longest_wait_s = 0.0
        self._next_try = 0.0
        self._retry_s = 0.25
        self._set_busy(LIVE_BUSY_S)

    def _set_busy(self, seconds: float) -> None:
        self.store.db.conn.execute(f"PRAGMA busy_timeout = {int(seconds * 1000)}")

    # -- the Store's write calls -------------------------------------------------------
    def begin_run(self, rig, **kwargs) -> PendingRun:
        """The run, begun (``commit=False``) with the first successful commit."""
        self.run = PendingRun(lambda: self.store.begin_run(rig, commit=False, **kwargs))
        return self.run

    def add_events(self, run_id: int, events: np.ndarray) -> int:
        self._queue(self.store.add_events, (run_id, np.array(events, copy=True)), {},
                    len(events))
        return len(events)

    def mask_events(self, run_id: int, spans) -> int:
        spans = [tuple(s) for s in spans]
        self._queue(self.store.mask_events, (run_id, spans), {}, len(spans))
        return 0

    def add_windows(self, run_id: int, rows, *, kind: str) -> int:
        rows = list(rows)
        self._queue(self.store.add_windows, (run_id, rows), {"kind": kind}, len(rows))
        return len(rows)

    def add_channels(self, run_id: int, channels) -> int:
        channels = {k: (np.array(t, copy=True), np.array(v, copy=True))
                    for k, (t, v) in channels.items()}
        rows = sum(len(t) for t, _ in channels.values())
        self._queue(self.store.add_channels, (run_id, channels), {}, rows)
        return rows

    def commit(self) -> bool:
        """Write everything waiting in one transaction; False (kept for later) if it failed."""
        run = self.run
        if not self._ops and (run is None or run.id is not None):
            return True
        run_was_written = run is not None and run.id is not None
        now = time.monotonic()
        if now < self._next_try:
            return False
        try:
            if run is not None and run.id is None:
                run.ensure()
            for fn, args, kwargs, _ in self._ops:
                if args and isinstance(args[0], PendingRun):
                    args = (args[0].ensure(), *args[1:])
                fn(*args, **kwargs)
            self.store.commit()
        except sqlite3.OperationalError as exc:  # locked, busy, disk full, I/O error
            if run is not None and run.id is not None and not run_was_written:
                run.id = None  # rolled back with the rest
            self._failed(str(exc), now)
            return False
        if self.failed_since is not None:
            self.longest_wait_s = max(self.longest_wait_s, now - self.failed_since)
        self._ops.clear()
        self.pending_rows = 0
        self.failed_since = None
        self._retry_s = 0.25
        self._next_try = 0.0
        return True

    def _queue(self, fn: Callable, args: tuple, kwargs: dict, rows: int) -> None:
        self._ops.append((fn, args, kwargs, rows))
        self.pending_rows += rows
        while self.pending_rows > self.max_rows and len(self._ops) > 1:
            k = next((i for i, op in enumerate(self._ops) if op[0] == self.store.add_events), 0)
            dropped = self._ops.pop(k)
            self.pending_rows -= dropped[3]
            self.dropped_rows += dropped[3]

    def _failed(self, error: str, now: float) -> None:
        try:
            self.store.rollback()
        except sqlite3.Error:
            pass
        self.failures += 1
        self.last_error = error
        if self.failed_since is None:
            self.failed_since = now
        self._next_try = now + self._retry_s
        self._retry_s = min(MAX_RETRY_S, self._retry_s * 2)

    # -- state ---------------------------------------------------------------------------
    @property
    def waiting_s(self) -> float:
        return 0.0 if self.failed_since is None else time.monotonic() - self.failed_since

    def state_line(self) -> str | None:
        """One line for the screen while writes wait (None when the store keeps up)."""
        if self.failed_since is None and not self.dropped_rows:
            return None
        line = (f"STORE not written for {self.waiting_s:.0f} s ({self.last_error}): "
                f"{self.pending_rows} rows kept in memory, retrying; recording goes on")
        if self.dropped_rows:
            line += f"; {self.dropped_rows} rows dropped (memory bound)"
        return line

    def fault_lines(self) -> list[str]:
        out = []
        if self.failures:
            out.append(f"the store could not be written {self.failures} time(s) during the "
                       f"ride (last: {self.last_error}); the longest wait was "
                       f"{max(self.longest_wait_s, self.waiting_s):.1f} s and everything "
                       "was written afterwards" if not self.dropped_rows else
                       f"the store could not be written for {self.longest_wait_s:.1f} s: "
                       f"{self.dropped_rows} rows were dropped (memory bound); the recording "
                       "holds the whole ride")
        return out

    def finish(self, wait_s: float, *, say: Callable[[str], None] | None = None) -> bool:
        """Try to write what waits for up to ``wait_s`` seconds; restore the normal lock wait."""
        end = time.monotonic() + wait_s
        told = False
        while not self.commit():
            if time.monotonic() >= end:
                break
            if say is not None and not told:
                say(f"waiting up to {wait_s:.0f} s for the store to take the last "
                    f"{self.pending_rows} rows ({self.last_error})")
                told = True
            time.sleep(min(0.25, max(self._next_try - time.monotonic(), 0.01)))
        done = not self._ops and (self.run is None or self.run.id is not None)
        self._set_busy(10.0)
        return done


__all__ = ["BufferedStore", "MAX_ROWS", "PendingRun"]
