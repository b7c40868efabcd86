"""Crank angle from tooth-wheel periods: edge times, gap sync and the 720° phase.

Stages
------
1. *Edges* (:mod:`dsp._crank_edges`): the periods of each frame are spread into tooth edges whose
   times are a cumulative sum of periods, anchored to the frames' receive times by a robust lower
   envelope of (receive time - summed time); lost frames become placeholder edges when their
   count can be trusted.
2. *Sync* (here): a period is a gap when it exceeds ``gap_ratio`` times the median of the two
   periods before and the two after it (symmetric, so a steady acceleration cancels). A
   revolution is accepted only when the next gap comes exactly ``real_teeth`` edges later with no
   gap, saturated period or broken count in between; its edges are held back until then, so an
   edge is never handed out with a tooth number that a later gap contradicts.
3. *Phase* (4-stroke): from the cam window (a vote over the frames of a revolution, so a late
   cam bit in a frame or two does not matter), else from the firing pattern
   (:func:`phase_from_pattern`), else unknown (angles as if phase 0, one event and one warning).

Angle convention: ``angle = 360 * R + tooth_angle - tdc_offset`` with ``R`` the revolution
count; for a 4-stroke, cylinder 1 fires in the revolutions with even ``R``, so its firing TDCs
lie at multiples of 720°. The first revolution synced has ``R`` of 0 or -1. After a loss of sync
the count goes on when the next good gap sits a whole number of revolutions (within
``max_slip_teeth``) after the last good one with nothing but a trusted count in between;
otherwise the phase is found afresh and ``R`` jumps forward by the revolutions the elapsed time
suggests. Angles and times never decrease; a phase correction moves the angle forward by 360°.

Loss policy: a loss of ``lost_before`` frames is trusted when it is at most ``max_lost_frames``
and the receive-time gap agrees with that many periods (35 % plus 2 ms of latency slack; an
8-bit counter that wrapped is far off); a trusted loss keeps the tooth count and invalidates
``loss_guard`` edges each side, an untrusted one breaks the count (sync lost, found again at the
next two gaps).

Hold-back: ``anchor_frames * 2 // 5`` frames for the anchor's look-ahead, plus one revolution
(until its closing gap is seen), plus up to ``2 * pattern_cycles`` revolutions while a phase is
being found from the pattern. Edge times are the receive times' lower envelope, i.e. they
include the smallest latency of the bus unless ``latency_floor_s`` says what it is.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from crankbeat.dsp._crank_edges import NORMAL, PLACEHOLDER, SATURATED, EdgeBatch, EdgeStage
from crankbeat.dsp._crank_phase import phase_distinguishable, phase_from_pattern
from crankbeat.dsp.engine import Engine
from crankbeat.errors import InputError, PhaseUnknownWarning

__all__ = [
    "ToothWheel",
    "SyncEvent",
    "CrankAngles",
    "CrankTracker",
    "reconstruct_crank",
    "phase_from_pattern",
    "phase_distinguishable",
]

PhaseMode = Literal["cam", "pattern", "auto"]
EventKind = Literal["gained", "lost", "phase-set", "phase-unknown"]


@dataclass(frozen=True)
class ToothWheel:
    """Crank trigger wheel as dsp sees it (a copy of the rig's wheel, no logger import).

    Parameters
    ----------
    teeth : int
        Tooth positions, missing ones included (60 for a 60-2 wheel).
    missing : int
        Missing teeth in the one gap.
    tdc_offset_deg : float
        Cylinder 1 TDC after the falling edge of tooth 0 (the first tooth after the gap), deg.
    cam : {"window", "none"}
        ``"window"``: the cam shows ``cam_active_level`` during the revolution (counted from
        tooth 0) that holds cylinder 1's firing TDC.
    cam_active_level : int
    """

    teeth: int = 60
    missing: int = 2
    tdc_offset_deg: float = 96.0
    cam: Literal["window", "none"] = "window"
    cam_active_level: int = 1

    def __post_init__(self) -> None:
        if not (isinstance(self.teeth, int | np.integer) and self.teeth >= 8):
            raise InputError(f"wheel teeth must be an integer >= 8, got {self.teeth!r}")
        if not (1 <= self.missing <= self.teeth // 4):
            raise InputError(
                f"wheel missing teeth must be 1..{self.teeth // 4} for {self.teeth} positions, "
                f"got {self.missing!r}"
            )
        if self.cam not in ("window", "none"):
            raise InputError(f"wheel cam must be 'window' or 'none', got {self.cam!r}")
        if not np.isfinite(self.tdc_offset_deg):
            raise InputError(f"tdc_offset_deg must be finite, got {self.tdc_offset_deg!r}")

    @property
    def real_teeth(self) -> int:
        return self.teeth - self.missing

    @property
    def pitch_deg(self) -> float:
        return 360.0 / self.teeth

    @classmethod
    def like(cls, wheel: object) -> "ToothWheel":
        """Copy any object with the same attribute names (such as the rig's wheel)."""
        w: Any = wheel
        return cls(int(w.teeth), int(w.missing), float(w.tdc_offset_deg), w.cam,
                   int(w.cam_active_level))


@dataclass(frozen=True)
class SyncEvent:
    """A change of synchronisation: ``t`` in s (CAN time base), a kind, a one-line message."""

    t: float
    kind: EventKind
    message: str


@dataclass
class CrankAngles:
    """The tooth edges one push hands out (only edges whose labels are final).

    Attributes
    ----------
    t : (n,) float64
        Falling-edge times, s, CAN time base.
    angle : (n,) float64
        Unwrapped crank angle, deg: 0 at cylinder 1's firing TDC of cycle 0, +cycle per working
        cycle; NaN where not synced.
    tooth : (n,) int64
        Physical tooth number 0..real_teeth-1, -1 where not synced.
    valid : (n,) bool
        Angle trustworthy: synced, no lost frames within the guard distance, and the 720° phase
        decided (while a cam or pattern decision is still pending, angles assume phase 0 and are
        not valid; for even-firing layouts with no cam they stay valid modulo 360°).
    period : (n,) float64
        Period that ended at this edge, s (NaN: saturated or unknown).
    events : list of SyncEvent
    """

    t: np.ndarray
    angle: np.ndarray
    tooth: np.ndarray
    valid: np.ndarray
    period: np.ndarray
    events: list[SyncEvent] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.t)

    @classmethod
    def empty(cls) -> "CrankAngles":
        f = np.empty(0)
        return cls(f, f.copy(), np.empty(0, np.int64), np.empty(0, bool), f.copy(), [])

    @classmethod
    def concat(cls, parts: list["CrankAngles"]) -> "CrankAngles":
        if not parts:
            return cls.empty()
        return cls(*(np.concatenate([getattr(p, n) for p in parts])
                     for n in ("t", "angle", "tooth", "valid", "period")),
                   [e for p in parts for e in p.events])


def _check_frames(frame_time, periods, cam, lost_before):
    ft = np.asarray(frame_time, dtype=float)
    p = np.asarray(periods, dtype=float)
    if p.ndim != 2:
        raise InputError(f"periods must have shape (m, k), got shape {p.shape}")
    m = p.shape[0]
    cm = np.asarray(cam).astype(np.int8, copy=False) if np.ndim(cam) else np.full(m, cam, np.int8)
    lost = np.asarray(lost_before).astype(np.int64, copy=False)
    if ft.shape != (m,) or cm.shape != (m,) or lost.shape != (m,):
        raise InputError(
            f"frame_time, cam and lost_before must have shape ({m},) like periods' rows, got "
            f"{ft.shape}, {cm.shape}, {lost.shape}"
        )
    if m and not np.all(np.isfinite(ft)):
        bad = int(np.flatnonzero(~np.isfinite(ft))[0])
        raise InputError(f"frame_time must be finite, frame {bad} has {ft[bad]!r}")
    if m and np.any(lost < 0):
        bad = int(np.flatnonzero(lost < 0)[0])
        raise InputError(f"lost_before must be >= 0, frame {bad} has {lost[bad]}")
    fin = p[np.isfinite(p)]
    if fin.size and fin.min() <= 0:
        raise InputError(f"tooth periods must be > 0 s (NaN for saturated), got {fin.min()!r}")
    return ft, p, cm, lost


class CrankTracker:
    """Streaming crank-angle reconstruction from tooth frames.

    Parameters
    ----------
    wheel : ToothWheel
    engine : Engine
    tooth_correction_deg : (real_teeth,) array_like or None, keyword-only
        Learnt tooth position errors (see :mod:`dsp.toothcal`), deg, added to each tooth's
        nominal angle. Tooth 0 is the reference (its entry should be 0).
    phase : {"auto", "cam", "pattern"}, keyword-only
        Where the 720° phase comes from. ``"auto"`` uses the cam when the wheel has a cam
        window, else the firing pattern where the layout allows it.
    gap_ratio : float or None
        Ratio of a period to the median of its four neighbours above which it is a gap
        (default ``1 + missing / 2``: 2 for 60-2, 1.5 for 36-1).
    loss_guard : int
        Edges on each side of lost frames marked invalid.
    max_lost_frames : int
        Longest loss (frames) whose count is trusted when its duration agrees.
    latency_floor_s : float
        Smallest receive latency of the bus, s, subtracted from the anchored times (the lower
        envelope finds the origin plus the smallest latency seen).
    anchor_frames : int
        Frames in the anchor window (two fifths of them ahead of the frame, held back).
    pattern_cycles : int
        Cycles of speed data per phase decision from the pattern.
    phase_confidence : float
        Confidence (0..1) a pattern decision needs.
    max_slip_teeth : int
        How far (edges) a re-found gap may sit from a whole number of revolutions after the
        last good revolution and still continue its revolution count and phase.
    """

    def __init__(
        self,
        wheel: ToothWheel,
        engine: Engine,
        *,
        tooth_correction_deg: np.ndarray | None = None,
        phase: PhaseMode = "auto",
        gap_ratio: float | None = None,
        loss_guard: int = 3,
        max_lost_frames: int = 64,
        latency_floor_s: float = 0.0,
        anchor_frames: int = 320,
        pattern_cycles: int = 6,
        phase_confidence: float = 0.95,
        max_slip_teeth: int = 3,
    ) -> None:
        if not isinstance(wheel, ToothWheel):
            wheel = ToothWheel.like(wheel)
        if phase not in ("cam", "pattern", "auto"):
            raise InputError(f"phase must be 'cam', 'pattern' or 'auto', got {phase!r}")
        self.wheel, self.engine = wheel, engine
        L = wheel.real_teeth
        corr = np.zeros(L) if tooth_correction_deg is None else np.asarray(
            tooth_correction_deg, dtype=float)
        if corr.shape != (L,) or not np.all(np.isfinite(corr)):
            raise InputError(
                f"tooth_correction_deg must be {L} finite values (one per real tooth), got "
                f"shape {corr.shape}"
            )
        self.gap_ratio = float(1 + wheel.missing / 2 if gap_ratio is None else gap_ratio)
        if not self.gap_ratio > 1:
            raise InputError(f"gap_ratio must be > 1, got {gap_ratio!r}")
        if anchor_frames < 4:
            raise InputError(f"anchor_frames must be >= 4, got {anchor_frames!r}")
        self.L = L
        self.tooth_angle = np.arange(L) * wheel.pitch_deg + corr - np.mod(wheel.tdc_offset_deg, 360)
        self._pending_angle: tuple[float, np.ndarray] | None = None  # (from time, tooth angles)
        self.guard = int(loss_guard)
        self.H = max(2, self.guard)
        self.slip = int(max_slip_teeth)
        self.P = int(pattern_cycles)
        self.conf_need = float(phase_confidence)
        four = engine.stroke_cycle == 4
        if not four:
            self.mode = "two-stroke"
        elif phase == "cam" or (phase == "auto" and wheel.cam == "window"):
            self.mode = "cam"
        elif phase_distinguishable(engine):
            self.mode = "pattern"
        else:
            self.mode = "none"
        self.hold_revs = 2 * self.P if self.mode == "pattern" else 4
        # "auto" with a cam window that the frames never fill (-1): fall back to the pattern
        self.cam_fallback = phase == "auto" and self.mode == "cam"
        ahead = max(anchor_frames * 2 // 5, 1)
        back = anchor_frames - ahead
        back += (ahead + back) % 2  # an odd window, centred as minimum_filter1d defines it
        self.edges = EdgeStage(lookahead=ahead, lookback=back,
                               max_lost=max_lost_frames, latency_floor_s=latency_floor_s,
                               loss_tolerance=0.35, latency_span_s=2e-3)
        self.buf = EdgeBatch.empty()
        self.e0 = 0  # global index of buf[0]
        self.emitted = 0  # global index of the first edge not yet handed out
        self.bad_off = 0  # bad edges (saturated, count reset) before buf[0]
        self.R = np.empty(0)  # revolution number of each buffered edge (NaN: unsynced)
        self.T = np.empty(0, np.int64)  # tooth number of each buffered edge (-1: unsynced)
        self.PH = np.empty(0, bool)  # the edge's 720° phase is known (or not needed)
        self.finished = False
        # sync state
        self.cont: int | None = None  # start of the next revolution when a run goes on
        self.search = 0  # where to look for the next gap when not in a run
        self.in_run = False
        self.last_s: int | None = None
        self.R_last = 0
        self.G_last_end = 0
        self.t_last_start = np.nan
        self.rev_time = np.nan
        self.phase_state = "none"  # "none" | "known" | "provisional"
        self.queue: list[int] = []
        self.R_min = 0
        self.shift_next = False
        self.cam_against = 0
        self.retest: list[tuple[np.ndarray, np.ndarray]] = []
        self.events: list[tuple[int, SyncEvent]] = []
        self.warned = False
        self.assigned: list[tuple[int, int]] = []

    # ------------------------------------------------------------------ public
    def push(self, frame_time, periods, cam, lost_before) -> CrankAngles:
        """Take the next tooth frames; return the edges whose labels became final.

        Parameters
        ----------
        frame_time : (m,) array_like
            Receive time of each frame, s.
        periods : (m, k) array_like
            Tooth periods, oldest first, s; NaN where saturated.
        cam : (m,) array_like of int
            Cam level at the last tooth of each frame (-1: no cam).
        lost_before : (m,) array_like of int
            Frames lost just before each frame.
        """
        if self.finished:
            raise InputError("push() after finish(): make a new CrankTracker for a new run")
        ft, p, cm, lost = _check_frames(frame_time, periods, cam, lost_before)
        if self.edges.k is not None and p.shape[0] and p.shape[1] != self.edges.k:
            raise InputError(f"periods per frame changed from {self.edges.k} to {p.shape[1]}")
        return self._advance(self.edges.push(ft, p, cm, lost))

    def finish(self) -> CrankAngles:
        """Hand out everything still held back (the last, unconfirmed revolution unsynced)."""
        if self.finished:
            return CrankAngles.empty()
        tail = self.edges.finish()
        self.finished = True
        return self._advance(tail)

    # ------------------------------------------------------------------ sync
    def _advance(self, new: EdgeBatch) -> CrankAngles:
        if len(new):
            self.buf = EdgeBatch.concat(self.buf, new)
            self.R = np.concatenate((self.R, np.full(len(new), np.nan)))
            self.T = np.concatenate((self.T, np.full(len(new), -1, np.int64)))
            self.PH = np.concatenate((self.PH, np.zeros(len(new), bool)))
        n = len(self.buf)
        end = self.e0 + n
        if n == 0:
            return CrankAngles.empty()
        p, kind = self.buf.p, self.buf.kind
        status = self._status(p)
        final_end = end if self.finished else end - 2
        bad = (kind == SATURATED) | self.buf.reset
        cumbad = np.concatenate(([0], np.cumsum(bad)))
        fin_rows = max(final_end - self.e0, 0)
        gaps = self.e0 + np.flatnonzero(status[:fin_rows] == 1)
        L = self.L
        cam = self.buf.cam
        self._cum_act = np.concatenate(([0], np.cumsum(cam == self.wheel.cam_active_level)))
        self._cum_cam = np.concatenate(([0], np.cumsum(cam >= 0)))
        self._ctx = (status, kind, cumbad, gaps, final_end)
        pending_s: int | None = None
        while True:
            if (self.cont is not None and self.in_run and self.phase_state == "known"
                    and not self.queue and not self.shift_next):
                self._fast_run()
            if self.cont is not None:
                s = self.cont
            else:
                i = int(np.searchsorted(gaps, self.search))
                if i >= len(gaps):
                    self.search = max(self.search, final_end)
                    break
                s = int(gaps[i])
            r0 = s - self.e0
            if s + L >= final_end:
                if not self.finished:
                    pending_s = s
                    break
                # the ride ends inside this revolution: unconfirmed, but no loss of sync
                self._flush_queue("the ride ends")
                self.in_run = False
                self.cont = None
                self.search = final_end
                break
            j = int(np.searchsorted(gaps, s, side="right"))
            nxt = int(gaps[j]) if j < len(gaps) else None
            st_end = status[r0 + L]
            reason = None
            if cumbad[r0 + L + 1] - cumbad[r0 + 1]:
                seg = kind[r0 + 1:r0 + L + 1]
                reason = ("saturated periods (engine stopped or cranking)"
                          if np.any(seg == SATURATED) else "frames lost, tooth count not trusted")
            elif nxt is not None and nxt < s + L:
                reason = f"gap after {nxt - s} teeth, expected {L}"
            elif not (st_end == 1 or (st_end == -1 and kind[r0 + L] != SATURATED)):
                reason = f"no gap after {L} teeth"
            if reason is None:
                self._valid(s, cumbad, status)
                self.cont = s + L
            else:
                self._invalid(s, reason)
        if self.finished:
            self._flush_queue("the ride ends")
            frontier = end
        elif self.queue:
            frontier = self.queue[0]
        elif pending_s is not None:
            frontier = pending_s
        else:
            frontier = self.search
        limit = end if self.finished else min(frontier, end - self.guard)
        return self._emit(max(limit, self.emitted))

    def _fast_run(self) -> None:
        """Accept, in one go, the revolutions of a run that need no decision beyond the count."""
        status, kind, cumbad, gaps, final_end = self._ctx
        L, s = self.L, self.cont
        n = (final_end - 1 - s) // L  # revolutions whose closing gap status is final
        if n <= 1:
            return
        st = s + L * np.arange(n)
        r = st - self.e0
        ok = cumbad[r + L + 1] - cumbad[r + 1] == 0
        ok &= np.searchsorted(gaps, st + L, "left") - np.searchsorted(gaps, st, "right") == 0
        se = status[r + L]
        ok &= (se == 1) | ((se == -1) & (kind[r + L] != SATURATED))
        if self.mode == "cam":
            ncam = self._cum_cam[r + L] - self._cum_cam[r]
            with np.errstate(invalid="ignore", divide="ignore"):
                v = (self._cum_act[r + L] - self._cum_act[r]) / ncam
            R_try = self.R_last + 1 + np.arange(n)
            against = ((v >= 0.75) & (R_try % 2 == 1)) | ((v <= 0.25) & (R_try % 2 == 0))
            ok &= ~against
        bad_at = np.flatnonzero(~ok)
        m = int(bad_at[0]) if len(bad_at) else n
        m = m - 1  # leave the last one to the careful path (it updates the run's bookkeeping)
        if m <= 0:
            return
        R = self.R_last + 1 + np.arange(m)
        self.assigned.append((st[:m], R, np.ones(m, bool)))
        if self.mode == "cam" and np.any((v[:m] >= 0.75) | (v[:m] <= 0.25)):
            self.cam_against = 0
        last = int(st[m - 1])
        t_last, t_prev = self.buf.t[last - self.e0], self.buf.t[last - L - self.e0]
        if np.isfinite(t_last) and np.isfinite(t_prev):
            self.rev_time = t_last - t_prev
        self.t_last_start = t_last
        self.last_s = last
        self.G_last_end = self._G(cumbad, last + L + 1)
        self.R_last = int(R[-1])
        self.cont = last + L

    def _vote(self, s: int) -> float:
        r0 = s - self.e0
        n = self._cum_cam[r0 + self.L] - self._cum_cam[r0]
        return (self._cum_act[r0 + self.L] - self._cum_act[r0]) / n if n else np.nan

    def _status(self, p: np.ndarray) -> np.ndarray:
        """1 gap, 0 tooth, -1 unknown, from the ratio to the median of four neighbours."""
        n = len(p)
        pad = np.concatenate((np.full(2, np.nan), p, np.full(2, np.nan)))
        a, b, c, d = pad[0:n], pad[1:n + 1], pad[3:n + 3], pad[4:n + 4]
        # median of four: the two middle values are the sum less the largest and the smallest
        hi = np.maximum(np.maximum(a, b), np.maximum(c, d))
        lo = np.minimum(np.minimum(a, b), np.minimum(c, d))
        med = 0.5 * (a + b + c + d - hi - lo)
        part = np.flatnonzero(np.isnan(med))
        nf = np.full(n, 4)
        if len(part):
            # fewer finite neighbours (next to a hole or a saturated period): sort those rows
            nb = np.stack((a[part], b[part], c[part], d[part]), axis=1)
            fin = np.isfinite(nb)
            k = fin.sum(axis=1)
            nf[part] = k
            srt = np.sort(np.where(fin, nb, np.inf), axis=1)
            med[part] = np.where(k == 3, srt[:, 1], 0.5 * (srt[:, 0] + np.take_along_axis(
                srt, np.clip(k - 1, 0, 3)[:, None], axis=1)[:, 0]))
        ok = np.isfinite(p) & (nf >= 2)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = p / med
        return np.where(ok, np.where(ratio > self.gap_ratio, 1, 0), -1).astype(np.int8)

    def _G(self, cumbad: np.ndarray, e: int) -> int:
        return self.bad_off + int(cumbad[e - self.e0])

    def _time_at(self, e: int) -> float:
        tt = self.buf.t[max(e - self.e0, 0):]
        fin = tt[np.isfinite(tt)]
        return float(fin[0]) if len(fin) else np.nan

    def _event(self, e: int, kind: EventKind, message: str) -> None:
        self.events.append((e, SyncEvent(self._time_at(e), kind, message)))

    def _invalid(self, s: int, reason: str) -> None:
        if self.in_run:
            self._flush_queue(reason)
            self._event(s, "lost", f"sync lost at edge {s}: {reason}")
        self.in_run = False
        self.cont = None
        self.search = s + 1

    def _valid(self, s: int, cumbad: np.ndarray, status: np.ndarray) -> None:
        L = self.L
        r0 = s - self.e0
        t0 = self.buf.t[r0]
        if not self.in_run:
            self._new_run(s, cumbad, t0)
        elif np.isfinite(t0) and np.isfinite(self.t_last_start):
            self.rev_time = t0 - self.t_last_start
        self.in_run = True
        self.last_s = s
        self.G_last_end = self._G(cumbad, s + L + 1)
        self.t_last_start = t0
        if self.queue or self.phase_state == "none":
            self.queue.append(s)
            self._try_resolve()
            return
        R = self.R_last + (2 if self.shift_next else 1)
        self.shift_next = False
        self._assign(s, R)
        self._check_known(s, R)

    def _new_run(self, s: int, cumbad: np.ndarray, t0: float) -> None:
        L = self.L
        self._event(s, "gained", f"sync gained at edge {s} (tooth 0 confirmed {L} edges later)")
        if self.last_s is None:
            self.R_min = -1 if self.engine.stroke_cycle == 4 else 0
            self.phase_state = "none"
            return
        n = int(round((s - self.last_s) / L))
        clean = self._G(cumbad, s + 1) - self.G_last_end == 0
        if clean and n >= 1 and abs(s - self.last_s - n * L) <= self.slip:
            # same count: the revolution number and the phase carry over
            self.R_last += n - 1
            return
        est = (t0 - self.t_last_start) / self.rev_time if self.rev_time > 0 else np.nan
        step = int(min(max(round(est), 1), 10**9)) if np.isfinite(est) else 1
        self.retest = []
        if self.mode == "two-stroke":
            self.R_last += step - 1
            return
        self.R_min = self.R_last + step
        self.phase_state = "none"

    # ------------------------------------------------------------------ phase
    def _try_resolve(self) -> None:
        q = self.queue
        if self.mode == "two-stroke":
            self._resolve(0, True, None)
            return
        if self.mode == "cam":
            v = self._vote(q[-1])
            if np.isnan(v) and self.cam_fallback:
                self.mode = "pattern" if phase_distinguishable(self.engine) else "none"
                self.hold_revs = 2 * self.P
                self.cam_fallback = False
                self._try_resolve()
                return
            if v >= 0.75 or v <= 0.25:
                self._resolve(len(q) - 1, v >= 0.75, "from the cam window")
                return
        elif self.mode == "pattern" and len(q) >= 2 * self.P:
            off, conf = self._pattern(q)
            if conf >= self.conf_need:
                self._resolve(0, off == 0.0, f"from the firing pattern (confidence {conf:.3f})")
                return
        if len(q) >= self.hold_revs or self.mode == "none":
            self._provisional()

    def _pattern(self, starts: list[int]) -> tuple[float, float]:
        rows = (np.asarray(starts) - self.e0)[:, None] + np.arange(self.L)
        ang = (360.0 * np.arange(len(starts)))[:, None] + self.tooth_angle
        return phase_from_pattern(ang.ravel(), self.buf.p[rows].ravel(), self.engine)

    def _resolve(self, qi: int, firing: bool, how: str | None) -> None:
        R = self.R_min + qi
        if self.mode != "two-stroke" and (R % 2 == 0) != firing:
            R += 1
        R0 = R - qi
        self.phase_state = "known"
        for i, s in enumerate(self.queue):
            self._assign(s, R0 + i)
        if how is not None:
            self._event(self.queue[0], "phase-set", f"720° phase set {how}")
        self.queue = []

    def _provisional(self) -> None:
        if self.mode == "none":
            msg = ("720° phase unknown: no cam and an even-firing layout; angles assume "
                   "cylinder 1 fires in the first revolution")
        else:
            msg = f"720° phase not yet known ({self.mode}); angles assume phase 0 for now"
        if not self.warned:
            warnings.warn(msg, PhaseUnknownWarning, stacklevel=3)
            self.warned = True
        self._event(self.queue[0], "phase-unknown", msg)
        R0 = self.R_min + (self.R_min % 2)
        self.phase_state = "provisional"
        for i, s in enumerate(self.queue):
            self._assign(s, R0 + i)
        self.queue = []

    def _flush_queue(self, reason: str) -> None:
        if not self.queue:
            return
        if self.mode == "pattern":
            off, conf = self._pattern(self.queue)
            if conf >= self.conf_need:
                self._resolve(0, off == 0.0, f"from the firing pattern (confidence {conf:.3f})")
                return
        self._provisional()

    def _check_known(self, s: int, R: int) -> None:
        """Later revolutions may confirm or correct a phase (cam disagreeing, pattern retest)."""
        if self.mode == "cam":
            v = self._vote(s)
            if not (v >= 0.75 or v <= 0.25):
                return
            agrees = (v >= 0.75) == (R % 2 == 0)
            if self.phase_state == "provisional":
                self.phase_state = "known"
                self._event(s, "phase-set", "720° phase set from the cam window"
                            + ("" if agrees else "; angle +360° from here"))
                self.shift_next = not agrees
                return
            self.cam_against = 0 if agrees else self.cam_against + 1
            if self.cam_against >= 2:
                self._event(s, "phase-set", "cam window disagrees with the tooth count for two "
                            "revolutions: angle +360° from here")
                self.shift_next = True
                self.cam_against = 0
        elif self.mode == "pattern" and self.phase_state == "provisional":
            r0 = s - self.e0
            self.retest.append((360.0 * R + self.tooth_angle, self.buf.p[r0:r0 + self.L]))
            if len(self.retest) >= 2 * self.P:
                ang = np.concatenate([a for a, _ in self.retest])
                per = np.concatenate([b for _, b in self.retest])
                self.retest = []
                # retest angles carry the current numbering, so offset 360 means "shift"
                off, conf = phase_from_pattern(ang, per, self.engine)
                if conf >= self.conf_need:
                    self.phase_state = "known"
                    self.shift_next = off != 0.0
                    self._event(s, "phase-set", f"720° phase set from the firing pattern "
                                f"(confidence {conf:.3f})"
                                + ("; angle +360° from here" if off else ""))

    def _assign(self, s: int, R: int) -> None:
        # a guessed phase (pattern or cam still undecided) may be 360° off: not valid
        ok = self.phase_state == "known" or self.mode in ("none", "two-stroke")
        self.assigned.append((np.array([s]), np.array([R]), np.array([ok])))
        self.R_last = R

    # ------------------------------------------------------------------ output
    def schedule_tooth_correction(self, correction_deg, from_time: float) -> None:
        """Apply learnt tooth errors to every edge at or after ``from_time`` (s).

        A correction learnt during the run (on its first fuel cut) takes effect at a time, not
        at the next push, so that the angles do not depend on how the stream was chunked: pick
        ``from_time`` later than any edge already handed out (a few seconds after the data it
        was learnt from is plenty for chunks of a second or less).
        """
        corr = np.asarray(correction_deg, dtype=float)
        if corr.shape != (self.L,) or not np.all(np.isfinite(corr)):
            raise InputError(
                f"correction_deg must be {self.L} finite values (one per real tooth), got "
                f"shape {corr.shape}"
            )
        base = np.arange(self.L) * self.wheel.pitch_deg - np.mod(self.wheel.tdc_offset_deg, 360)
        self._pending_angle = (float(from_time), base + corr)

    def _tooth_angle_at(self, t: np.ndarray, tooth: np.ndarray) -> np.ndarray:
        """Angle of each tooth number within its revolution, as in force at each edge time."""
        safe = np.where(tooth >= 0, tooth, 0)
        pending = self._pending_angle
        if pending is None:
            return self.tooth_angle[safe]
        from_time, new = pending
        late = t >= from_time
        out = np.where(late, new[safe], self.tooth_angle[safe])
        if late.all() and len(t):
            self.tooth_angle, self._pending_angle = new, None
        return out

    def _emit(self, limit: int) -> CrankAngles:
        if self.assigned:
            st = np.concatenate([a[0] for a in self.assigned])
            Rs = np.concatenate([a[1] for a in self.assigned])
            ok = np.concatenate([a[2] for a in self.assigned])
            rows = (st - self.e0)[:, None] + np.arange(self.L)
            self.R[rows] = np.broadcast_to(Rs[:, None], rows.shape)
            self.PH[rows] = np.broadcast_to(ok[:, None], rows.shape)
            self.T[rows] = np.broadcast_to(np.arange(self.L), rows.shape)
            self.assigned = []
        lo, hi = self.emitted - self.e0, limit - self.e0
        b = self.buf
        out = CrankAngles.empty()
        if hi > lo:
            kind = b.kind
            ph = kind == PLACEHOLDER
            if ph.any():
                cph = np.concatenate(([0], np.cumsum(ph)))
                g = self.guard
                idx = np.arange(lo, hi)
                near = cph[np.minimum(idx + g + 1, len(b))] - cph[np.maximum(idx - g, 0)] > 0
            else:
                near = np.zeros(hi - lo, bool)
            R = self.R[lo:hi]
            synced = np.isfinite(R)
            tooth = self.T[lo:hi].copy()
            angle = np.full(hi - lo, np.nan)
            angle[synced] = 360.0 * R[synced] + self._tooth_angle_at(b.t[lo:hi], tooth)[synced]
            valid = synced & ~near & (kind[lo:hi] == NORMAL) & self.PH[lo:hi]
            keep = kind[lo:hi] != PLACEHOLDER
            ev = [e for i, e in self.events if i < limit]
            self.events = [(i, e) for i, e in self.events if i >= limit]
            out = CrankAngles(b.t[lo:hi][keep], angle[keep], tooth[keep], valid[keep],
                              b.p[lo:hi][keep], ev)
            self.emitted = limit
        drop = max(limit - self.H - self.e0, 0)
        if drop:
            self.bad_off += int(np.sum((b.kind[:drop] == SATURATED) | b.reset[:drop]))
            self.buf = b.take(slice(drop, None))
            self.R = self.R[drop:]
            self.T = self.T[drop:]
            self.PH = self.PH[drop:]
            self.e0 += drop
        return out


def reconstruct_crank(frame_time, periods, cam, lost_before, wheel: ToothWheel, engine: Engine,
                      **options) -> CrankAngles:
    """Whole-array crank reconstruction: the same numbers as :class:`CrankTracker` in chunks.

    Parameters are those of :meth:`CrankTracker.push` plus the tracker's ``wheel``, ``engine``
    and keyword options. Returns one :class:`CrankAngles` for the whole recording.
    """
    tr = CrankTracker(wheel, engine, **options)
    return CrankAngles.concat([tr.push(frame_time, periods, cam, lost_before), tr.finish()])
