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

from crankbeat.dsp.crank import CrankAngles, CrankTracker, ToothWheel
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import (
    COUNTED_VERDICTS,
    FIRED,
    MISFIRE,
    VERDICT_NAMES,
    counted_total,
    empty_detail,
    empty_events,
)
from crankbeat.dsp.fluctuation import RAW_EVENT_DTYPE, FluctuationStage, WindowSpec
from crankbeat.dsp.inertia import InertiaEstimator
from crankbeat.dsp.intervals import SpeedProfile
from crankbeat.dsp.misfire import MisfireDetector, MisfireSettings
from crankbeat.errors import InputError


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
    detail : ndarray of :data:`dsp.events.EVENT_DETAIL_DTYPE` or None
        Per-event depth and cause, same length and order as ``events``.
    """

    events: np.ndarray
    crank: CrankAngles
    notes: list[str] = field(default_factory=list)
    detail: np.ndarray | None = None


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
        self.inertia = InertiaEstimator(engine, wheel.pitch_deg)
        self.detector = MisfireDetector(engine, settings=self.settings)
        self.max_age = float(max_status_age_s)
        #: running crank-speed profile of the cycle, for :func:`dsp.intervals.identify_layout`
        self.profile = SpeedProfile(engine.cycle_deg if engine.stroke_cycle == 4 else 720.0,
                                    wheel.pitch_deg)
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

    def schedule_tooth_correction(self, correction_deg, from_time: float) -> None:
        """Correct tooth position errors (deg, one per real tooth) from CAN time ``from_time``, s.

        See :meth:`dsp.crank.CrankTracker.schedule_tooth_correction`.
        """
        self.tracker.schedule_tooth_correction(correction_deg, from_time)

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
        self.profile.add(crank)
        self.inertia.push(crank.t, crank.angle, crank.valid)
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
        detail = self.detector.take_detail()
        self._trim_status()
        return AnalyzerStep(events=events if events.size else empty_events(0), crank=crank,
                            notes=notes, detail=detail if detail.size else empty_detail(0))

    def verdict_report(self) -> dict:
        """Run-level findings of the misfire decision so far (see
        :meth:`dsp.misfire.MisfireDetector.report`), with the effective inertia the data shows
        beside the rig file's (``inertia_kgm2``: estimate or None, ``rig_inertia_kgm2``)."""
        out = self.detector.report()
        out["rig_inertia_kgm2"] = float(self.engine.inertia_kgm2)
        out["inertia_kgm2"] = est = self.inertia.result()
        if est is None:
            out["inertia_note"] = self.inertia.why_none()
        else:
            out["notes"].append(
                f"effective rotating inertia from the crank speed: {est:.4f} kg m^2 (rig file "
                f"{self.engine.inertia_kgm2:.4f}; a rough estimate from {self.inertia.cycles} "
                "cycles at speed)")
        return out

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
        notes=a.notes + b.notes + an.verdict_report()["notes"],
        detail=np.concatenate((a.detail, b.detail)),
    )


# --- whole-run summaries over the event array (pure functions) ---------------------------------

#: Misfire pattern labels of :func:`misfire_patterns`.
PATTERNS = ("isolated", "consecutive", "alternating", "random")


def _counted(events: np.ndarray) -> np.ndarray:
    """Events that count for rates: fired, partial or misfire (not masked, fuel cut, unusable)."""
    return np.isin(events["verdict"], COUNTED_VERDICTS)


def misfire_counts(events: np.ndarray, n_cyl: int) -> dict[str, np.ndarray]:
    """Per-cylinder counts of each verdict and the misfire rate.

    Parameters
    ----------
    events : ndarray of EVENT_DTYPE
    n_cyl : int

    Returns
    -------
    dict with (n_cyl,) arrays ``fired``, ``misfire``, ``masked``, ``unusable``, ``fuel_cut``,
    ``partial`` (int) and ``rate_pct`` (misfires / (fired + partial + misfires), %, NaN when
    nothing was counted), and the
    totals under ``total_misfire`` and ``total_rate_pct``.
    """
    if int(n_cyl) < 1:
        raise InputError(f"n_cyl must be >= 1, got {n_cyl!r}")
    cyl = events["cylinder"].astype(np.int64) - 1
    if cyl.size and (cyl.min() < 0 or cyl.max() >= n_cyl):
        raise InputError(f"cylinder numbers {cyl.min() + 1}..{cyl.max() + 1} outside 1..{n_cyl}")
    out: dict[str, np.ndarray] = {}
    for code, name in VERDICT_NAMES.items():
        out[name] = np.bincount(cyl[events["verdict"] == code], minlength=n_cyl)
    denom = counted_total(out)
    with np.errstate(invalid="ignore", divide="ignore"):
        out["rate_pct"] = np.where(denom > 0, 100.0 * out["misfire"] / denom, np.nan)
    tot = int(denom.sum())
    out["total_misfire"] = np.array(int(out["misfire"].sum()))
    out["total_rate_pct"] = np.array(100.0 * out["misfire"].sum() / tot if tot else np.nan)
    return out


WINDOW_DTYPE = np.dtype(
    [
        ("start_cycle", "i8"),
        ("t_start", "f8"),
        ("t_end", "f8"),
        ("counted", "i8"),  # events of COUNTED_VERDICTS (fired, partial, misfire) in the window
        ("misfires", "i8"),
        ("rate_pct", "f8"),  # total misfire rate of the window, %
        ("complete", "?"),  # the window spans its full number of revolutions
    ]
)


def window_rates(
    events: np.ndarray, *, revolutions: int = 200, engine: Engine
) -> tuple[np.ndarray, np.ndarray]:
    """Misfire rates over consecutive windows of crank revolutions.

    The OBD misfire monitors count in 200-revolution windows (catalyst-damage level) and
    1000-revolution windows (emission level); from memory of 13 CCR 1968.2(e)(3).

    Parameters
    ----------
    events : ndarray of EVENT_DTYPE
    revolutions : int, keyword-only
        Crank revolutions per window.
    engine : Engine, keyword-only

    Returns
    -------
    windows : ndarray of :data:`WINDOW_DTYPE`, one per window that holds events
    per_cylinder_pct : (n_windows, n_cyl) float, misfire rate per cylinder in each window, %
    """
    if int(revolutions) != revolutions or revolutions < 1:
        raise InputError(f"revolutions must be a positive integer, got {revolutions!r}")
    revs_per_cycle = engine.cycle_deg / 360.0
    cycles_per_window = revolutions / revs_per_cycle
    n = engine.n_cylinders
    if not events.size:
        return np.zeros(0, WINDOW_DTYPE), np.zeros((0, n))
    win = np.floor(events["cycle"] / cycles_per_window).astype(np.int64)
    uw, inv = np.unique(win, return_inverse=True)
    counted = _counted(events)
    mis = events["verdict"] == MISFIRE
    out = np.zeros(uw.size, WINDOW_DTYPE)
    out["start_cycle"] = np.ceil(uw * cycles_per_window).astype(np.int64)
    out["counted"] = np.bincount(inv, counted, minlength=uw.size)
    out["misfires"] = np.bincount(inv, mis, minlength=uw.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = 100.0 * out["misfires"] / out["counted"]
        out["rate_pct"] = np.where(out["counted"] > 0, rate, np.nan)
    t = events["t"]
    out["t_start"] = [np.nanmin(t[inv == i]) if np.isfinite(t[inv == i]).any() else np.nan
                      for i in range(uw.size)]
    out["t_end"] = [np.nanmax(t[inv == i]) if np.isfinite(t[inv == i]).any() else np.nan
                    for i in range(uw.size)]
    span = np.bincount(inv, minlength=uw.size)
    out["complete"] = span >= 0.98 * cycles_per_window * n
    cyl = events["cylinder"].astype(np.int64) - 1
    key = inv * n + cyl
    c_cnt = np.bincount(key, counted, minlength=uw.size * n).reshape(uw.size, n)
    c_mis = np.bincount(key, mis, minlength=uw.size * n).reshape(uw.size, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        per = np.where(c_cnt > 0, 100.0 * c_mis / c_cnt, np.nan)
    return out, per


def misfire_patterns(events: np.ndarray, *, near_events: int | None = None) -> dict[str, object]:
    """Classify each misfire by its neighbours.

    * ``consecutive``: the same cylinder also misfired in the previous or next cycle;
    * ``alternating``: misfires on one cylinder every other cycle (k-2, k+2 cycles), or on
      different cylinders in turn, with no consecutive one;
    * ``isolated``: no other misfire within ``near_events`` events (default 4 cycles);
    * ``random``: the rest (other misfires nearby, no pattern).

    Returns
    -------
    dict with ``labels`` (one per misfire, in event order), ``counts`` per label, and
    ``index`` (positions of the misfires in ``events``).
    """
    cyl = events["cylinder"].astype(np.int64)
    n = int(cyl.max()) if cyl.size else 1
    near = 4 * n if near_events is None else int(near_events)
    mis_at = np.flatnonzero(events["verdict"] == MISFIRE)
    cycles = events["cycle"]
    key = set(zip(cyl[mis_at].tolist(), cycles[mis_at].tolist()))
    labels = []
    for i in mis_at:
        c, k = int(cyl[i]), int(cycles[i])
        if (c, k - 1) in key or (c, k + 1) in key:
            labels.append("consecutive")
            continue
        lo, hi = np.searchsorted(mis_at, [i - near, i + near + 1])
        others = mis_at[lo:hi]
        others = others[others != i]
        if others.size == 0:
            labels.append("isolated")
        elif (c, k - 2) in key or (c, k + 2) in key or _takes_turns(i, others, cyl):
            labels.append("alternating")
        else:
            labels.append("random")
    counts = {p: labels.count(p) for p in PATTERNS}
    return {"labels": labels, "counts": counts, "index": mis_at}


def _takes_turns(i: int, others: np.ndarray, cyl: np.ndarray) -> bool:
    before = others[others < i]
    after = others[others > i]
    return bool(
        before.size and after.size and cyl[before[-1]] != cyl[i] and cyl[after[0]] != cyl[i]
    )


def cylinder_contribution(events: np.ndarray) -> dict[int, dict[str, float]]:
    """Relative contribution of each cylinder over the fired events.

    ``contribution`` of an event is its work over the engine's current typical work (1.0 =
    average cylinder). Returns per cylinder the median ``contribution``, its robust spread and
    the number of fired events; a weak cylinder that still fires shows a median below 1.
    """
    fired = (events["verdict"] == FIRED) & np.isfinite(events["contribution"])
    out: dict[int, dict[str, float]] = {}
    for c in np.unique(events["cylinder"]):
        x = events["contribution"][fired & (events["cylinder"] == c)]
        if x.size:
            med = float(np.median(x))
            out[int(c)] = {
                "median": med,
                "spread": 1.4826 * float(np.median(np.abs(x - med))),
                "n": float(x.size),
            }
        else:
            out[int(c)] = {"median": float("nan"), "spread": float("nan"), "n": 0.0}
    return out
