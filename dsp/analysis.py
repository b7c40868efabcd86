"""The one streaming object the pipeline calls per chunk: crank angle → events → verdicts.

``EventAnalyzer.push(teeth frames, status)`` runs :class:`dsp.crank.CrankTracker`, the per-event
work estimate (:mod:`dsp.fluctuation`) and the misfire decision (:mod:`dsp.misfire`) and returns
the events that became final. :func:`analyse_ride` does a whole run at once with identical numbers.

Throttle at an event is the last status sample at or before the event's time, if it is at most
``max_status_age_s`` old (else NaN). A streaming event waits until a status sample at or after its
time has arrived, or until the crank data has run ``max_status_age_s`` past it; as long as status
frames arrive in time order with the tooth frames (one CAN bus), streaming and whole-array agree.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from dsp.crank import CrankAngles, CrankTracker, ToothWheel
from dsp.engine import Engine
from dsp.errors import InputError
from dsp.events import empty_events
from dsp.fluctuation import RAW_EVENT_DTYPE, FluctuationStage, WindowSpec
from dsp.misfire import MisfireDetector, MisfireSettings


@dataclass
class AnalyzerStep:
    """What one push yields.

    Attributes
    ----------
    events : ndarray of :data:`dsp.events.EVENT_DTYPE`
        Events that became final in this push, in order.
    crank : CrankAngles
        The tooth edges of this push (for order tracking).
    notes : list of str
        One-line messages (sync gained/lost, phase).
    """

    events: np.ndarray
    crank: CrankAngles
    notes: list[str] = field(default_factory=list)


class EventAnalyzer:
    """Streaming per-event analysis of one run.

    Parameters
    ----------
    engine : Engine
    wheel : ToothWheel
    settings : MisfireSettings, keyword-only
    tooth_correction_deg : (real_teeth,) array_like or None, keyword-only
        Learnt tooth position errors, passed to the crank tracker.
    window : WindowSpec or None, keyword-only
        Per-event window (default :func:`dsp.fluctuation.default_window`).
    max_status_age_s : float, keyword-only
        Oldest status sample still used for an event's throttle, s.
    tracker_options : dict or None, keyword-only
        Extra keyword options of :class:`dsp.crank.CrankTracker`.
    """

    def __init__(
        self,
        engine: Engine,
        wheel: ToothWheel,
        *,
        settings: MisfireSettings | None = None,
        tooth_correction_deg=None,
        window: WindowSpec | None = None,
        max_status_age_s: float = 0.5,
        tracker_options: dict | None = None,
    ) -> None:
        if not isinstance(wheel, ToothWheel):
            wheel = ToothWheel.like(wheel)
        if not max_status_age_s > 0:
            raise InputError(f"max_status_age_s must be > 0, got {max_status_age_s!r}")
        self.engine, self.wheel = engine, wheel
        self.settings = settings or MisfireSettings()
        self.tracker = CrankTracker(
            wheel, engine, tooth_correction_deg=tooth_correction_deg, **(tracker_options or {})
        )
        self.fluct = FluctuationStage(engine, wheel.pitch_deg, window=window)
        self.detector = MisfireDetector(engine, settings=self.settings)
        self.max_age = float(max_status_age_s)
        self._st_t = np.empty(0)
        self._st_v = np.empty(0)
        self._has_status = False
        self._pending = np.zeros(0, dtype=RAW_EVENT_DTYPE)
        self._crank_t = -np.inf

    def push(
        self, frame_time, periods, cam, lost_before, *, status_t=None, throttle=None
    ) -> AnalyzerStep:
        """Take the next tooth frames (and status samples); return the final events.

        Parameters
        ----------
        frame_time, periods, cam, lost_before
            As :meth:`dsp.crank.CrankTracker.push` (see :class:`logger.chunks.TeethBlock`).
        status_t, throttle : (m,) array_like or None, keyword-only
            Status sample times (s) and throttle (%), in time order.
        """
        self._take_status(status_t, throttle)
        crank = self.tracker.push(frame_time, periods, cam, lost_before)
        return self._step(crank, final=False)

    def finish(self) -> AnalyzerStep:
        """Flush everything held back (the last events lack look-ahead)."""
        crank = self.tracker.finish()
        return self._step(crank, final=True)

    # ------------------------------------------------------------------------------------------
    def _take_status(self, status_t, throttle) -> None:
        if status_t is None and throttle is None:
            return
        if status_t is None or throttle is None:
            raise InputError("status_t and throttle must be given together")
        st = np.asarray(status_t, dtype=float).ravel()
        th = np.asarray(throttle, dtype=float).ravel()
        if st.shape != th.shape:
            raise InputError(f"status_t has {st.size} samples but throttle has {th.size}")
        if st.size == 0:
            return
        self._has_status = True
        self._st_t = np.concatenate((self._st_t, st))
        self._st_v = np.concatenate((self._st_v, th))

    def _step(self, crank: CrankAngles, *, final: bool) -> AnalyzerStep:
        notes = [e.message for e in crank.events]
        raw = self.fluct.push(crank.t, crank.angle, crank.valid, crank.period)
        if final:
            raw = np.concatenate((raw, self.fluct.finish()))
        if crank.t.size:
            self._crank_t = max(self._crank_t, float(np.nanmax(crank.t)))
        self._pending = np.concatenate((self._pending, raw))
        ready = self._pending.size if final else self._ready_count()
        go, self._pending = self._pending[:ready], self._pending[ready:]
        events = self.detector.push(go, self._throttle_at(go["t"]))
        if final:
            events = np.concatenate((events, self.detector.finish()))
        self._trim_status()
        return AnalyzerStep(events=events if events.size else empty_events(0), crank=crank,
                            notes=notes)

    def _ready_count(self) -> int:
        if not self._has_status or not self._pending.size:
            return self._pending.size
        t = self._pending["t"]
        last_st = self._st_t[-1] if self._st_t.size else -np.inf
        ok = (t <= last_st) | (t + self.max_age < self._crank_t) | ~np.isfinite(t)
        bad = np.flatnonzero(~ok)
        return int(bad[0]) if bad.size else self._pending.size

    def _throttle_at(self, t: np.ndarray) -> np.ndarray:
        out = np.full(t.size, np.nan)
        if not self._st_t.size or not t.size:
            return out
        i = np.searchsorted(self._st_t, t, side="right") - 1
        ok = (i >= 0) & np.isfinite(t)
        ic = np.clip(i, 0, self._st_t.size - 1)
        age = t - self._st_t[ic]
        ok &= age <= self.max_age
        out[ok] = self._st_v[ic[ok]]
        return out

    def _trim_status(self) -> None:
        # keep the samples a pending or future event can still need
        if self._st_t.size < 2:
            return
        horizon = self._pending["t"][0] if self._pending.size else self._crank_t - 2 * self.max_age
        if not np.isfinite(horizon):
            return
        cut = int(np.searchsorted(self._st_t, horizon - 2 * self.max_age, side="right")) - 1
        if cut > 0:
            self._st_t = self._st_t[cut:]
            self._st_v = self._st_v[cut:]


def analyse_ride(
    frame_time,
    periods,
    cam,
    lost_before,
    engine: Engine,
    wheel: ToothWheel,
    *,
    status_t=None,
    throttle=None,
    settings: MisfireSettings | None = None,
    tooth_correction_deg=None,
    window: WindowSpec | None = None,
) -> AnalyzerStep:
    """Whole-run version of :class:`EventAnalyzer`: identical events, one call.

    Parameters are those of :class:`EventAnalyzer` and its ``push``; the returned step holds every
    event of the run and the whole crank reconstruction.
    """
    an = EventAnalyzer(
        engine, wheel, settings=settings, tooth_correction_deg=tooth_correction_deg, window=window
    )
    a = an.push(frame_time, periods, cam, lost_before, status_t=status_t, throttle=throttle)
    b = an.finish()
    return AnalyzerStep(
        events=np.concatenate((a.events, b.events)),
        crank=CrankAngles.concat([a.crank, b.crank]),
        notes=a.notes + b.notes,
    )
