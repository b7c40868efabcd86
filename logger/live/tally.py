"""Running tallies that turn the pipeline's results into a :class:`LiveState`.

The live pipeline pushes each step's events, the stream health and the vibration level; the
display asks for :meth:`LiveTally.state` a few times a second. Memory is bounded: only the
events of the last 200 revolutions (and a few hundred intervals per cylinder) are kept.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import COUNTED_VERDICTS, FIRED, MASKED, MISFIRE, PARTIAL, UNUSABLE
from crankbeat.errors import InputError
from crankbeat.logger.chunks import StreamHealth
from crankbeat.logger.live.display import CylinderState, IntervalState, LiveState
from crankbeat.logger.report.text import ride_time

#: How far back (s) a rough-road span closing now may mask events already counted.
MASK_REACH_S = 60.0


class LiveTally:
    """Counts per cylinder, the latest 200-revolution window, recent firing intervals.

    Parameters
    ----------
    engine : Engine
        Gives the firing order (which interval ends at which cylinder) and the cycle length.
    window_revs : int
        Crank revolutions of the rolling misfire-rate window (200: the catalyst-damage window of
        the OBD misfire monitors, from memory of 13 CCR 1968.2).
    interval_events : int
        Fired events per cylinder averaged for the observed interval.
    interval_tolerance_deg : float
        Shown with the interval check (the rig's ``limits.interval_tolerance_deg``).
    """

    def __init__(self, engine: Engine, *, window_revs: int = 200, interval_events: int = 200,
                 interval_tolerance_deg: float = 3.0) -> None:
        if window_revs < 1 or interval_events < 1:
            raise InputError(f"window_revs and interval_events must be >= 1, got "
                             f"{window_revs!r}, {interval_events!r}")
        self.engine = engine
        self.cycles_per_window = window_revs / (engine.cycle_deg / 360.0)
        self.tolerance = float(interval_tolerance_deg)
        n = engine.n_cylinders
        self.events = np.zeros(n, dtype=np.int64)
        self.misfires = np.zeros(n, dtype=np.int64)
        self.partial = np.zeros(n, dtype=np.int64)
        self._recent: deque[list] = deque()  # [cycle, cylinder, verdict, t]
        self._intervals = {c: deque(maxlen=interval_events) for c in range(1, n + 1)}
        self._expected: dict[int, float] = {}
        self._contrib = {c: deque(maxlen=interval_events) for c in range(1, n + 1)}
        self._last_verdict: int | None = None
        self.rpm: float | None = None
        self.throttle: float | None = None
        self.health = StreamHealth()
        self.vibration: dict[str, float] = {}
        self.vibration_weighting: dict[str, str] = {}
        self._vib_last: dict[str, tuple[float, int]] = {}  # sensor -> (sum of squares, n)
        self.wheel_learnt = True
        self.t_start: float | None = None  # CAN time of the first event: notes count from it
        self.notes: list[str] = []

    def push_events(self, events: np.ndarray) -> None:
        """Add final events (dsp.events.EVENT_DTYPE) in the order they were decided."""
        if not len(events):
            return
        for c, v in zip(events["cylinder"].tolist(), events["verdict"].tolist(), strict=True):
            self._count(c, v, +1)
        fired = events[events["verdict"] == FIRED]
        for row in fired[["cylinder", "interval_deg", "expected_interval_deg",
                          "contribution"]].tolist():
            c, obs, exp, con = row
            if np.isfinite(obs):
                self._intervals[c].append(obs)
            if np.isfinite(exp):
                self._expected[c] = exp
            if np.isfinite(con):
                self._contrib[c].append(con)
        if self.t_start is None and np.isfinite(events["t"]).any():
            self.t_start = float(np.nanmin(events["t"]))
        self._recent.extend(list(row) for row in zip(
            events["cycle"].tolist(), events["cylinder"].tolist(), events["verdict"].tolist(),
            events["t"].tolist(), strict=True))
        newest, t_newest = self._recent[-1][0], self._recent[-1][3]
        # kept for the window, and for a rough-road span that closes late (see mask)
        while self._recent and (self._recent[0][0] <= newest - self.cycles_per_window
                                and not self._recent[0][3] > t_newest - MASK_REACH_S):
            self._recent.popleft()
        self._last_verdict = int(events["verdict"][-1])
        rpm = events["rpm"][np.isfinite(events["rpm"])]
        if rpm.size:
            self.rpm = float(rpm[-1])

    def mask(self, spans) -> None:
        """Rough-road spans ``(t0, t1)`` closed after their events were pushed: the judged events
        inside become masked and leave every count, as they do in the store. Events of the last
        :data:`MASK_REACH_S` seconds are kept for this (a rough stretch closes at its end)."""
        for t0, t1 in spans:
            for row in self._recent:
                _, c, v, t = row
                if t0 <= t <= t1 and v in COUNTED_VERDICTS:
                    self._count(c, v, -1)
                    row[2] = MASKED

    def _count(self, c: int, verdict: int, sign: int) -> None:
        """Add (+1) or take back (-1) one event of cylinder ``c`` in the running counts."""
        if verdict in COUNTED_VERDICTS:
            self.events[c - 1] += sign
            self.misfires[c - 1] += sign * (verdict == MISFIRE)
            self.partial[c - 1] += sign * (verdict == PARTIAL)

    def set_status(self, *, rpm: float | None = None, throttle: float | None = None) -> None:
        if rpm is not None:
            self.rpm = float(rpm)
        if throttle is not None:
            self.throttle = float(throttle)

    def set_health(self, health: StreamHealth) -> None:
        self.health = health

    def set_vibration(self, sensor: str, weighted_rms: float, weighting: str = "Wh") -> None:
        """The sensor's recent r.m.s. (m/s²) and its weighting ("none" = location unweighted)."""
        self.vibration[sensor] = float(weighted_rms)
        self.vibration_weighting[sensor] = weighting

    def set_wheel_learnt(self, learnt: bool) -> None:
        """Whether the tooth spacing errors are corrected; intervals seen before are dropped."""
        if learnt and not self.wheel_learnt:
            for q in self._intervals.values():
                q.clear()
        self.wheel_learnt = bool(learnt)

    def follow(self, analysis, *, every_samples_s: float = 2.0) -> None:
        """Take the wheel state and each board's recent vibration from a running
        :class:`logger.pipeline.RunAnalysis` (called after each step)."""
        self.set_wheel_learnt(bool(analysis.tooth_correction_applied))
        vib = getattr(analysis, "vibration", None)
        for name, (total, n_total, fs, kind) in (vib.weighted_energy() if vib else {}).items():
            last = self._vib_last.get(name)
            if last is None:
                self._vib_last[name] = (total, n_total)
                continue
            n = n_total - last[1]
            if n >= every_samples_s * fs:  # a fresh value every couple of seconds
                self.set_vibration(name, float(np.sqrt((total - last[0]) / n)), kind)
                self._vib_last[name] = (total, n_total)

    def state(self, elapsed_s: float, *, recording: str | None = None) -> LiveState:
        n = self.engine.n_cylinders
        cnt = np.zeros(n)
        mis = np.zeros(n)
        first_cycle = self._recent[-1][0] - self.cycles_per_window if self._recent else 0
        # a rate only over a whole window, as the stored windows' "complete": at the start of
        # a ride one misfire in three events must not read 33 % and raise the alert
        complete = bool(self._recent) and (self._recent[-1][0] - self._recent[0][0] + 1
                                           >= 0.98 * self.cycles_per_window)
        # newest first, stopping at the window's start: the deque also keeps up to MASK_REACH_S
        # of older events for late masks, and this runs a few times a second
        for cycle, c, v, _ in reversed(self._recent):
            if cycle <= first_cycle:
                break
            if v in COUNTED_VERDICTS:
                cnt[c - 1] += 1
                mis[c - 1] += v == MISFIRE
        cylinders = []
        for c in range(1, n + 1):
            rate = 100.0 * mis[c - 1] / cnt[c - 1] if cnt[c - 1] and complete else None
            contrib = float(np.mean(self._contrib[c])) if self._contrib[c] else None
            cylinders.append(CylinderState(c, int(self.events[c - 1]), int(self.misfires[c - 1]),
                                           rate, contrib, int(self.partial[c - 1])))
        order = list(self.engine.firing_order)
        intervals = []
        for k, c in enumerate(order):
            if c not in self._expected:
                continue
            obs = float(np.mean(self._intervals[c])) if self._intervals[c] else None
            intervals.append(IntervalState(order[k - 1], c, self._expected[c], obs))
        h = self.health
        return LiveState(
            elapsed_s=float(elapsed_s), rpm=self.rpm, throttle_pct=self.throttle,
            cylinders=cylinders, intervals=intervals, interval_tolerance_deg=self.tolerance,
            vibration=dict(self.vibration), can_frames=h.can_frames, can_lost=h.can_lost_frames,
            serial_crc_errors=sum(h.serial_corrupt.values()),
            serial_reconnects=sum(h.serial_reconnects.values()),
            synced=self._last_verdict != UNUSABLE, recording=recording,
            notes=[ride_time(str(n), self.t_start) for n in list(h.notes[-3:]) + self.notes[-3:]],
            wheel_learnt=self.wheel_learnt, vibration_weighting=dict(self.vibration_weighting),
        )
