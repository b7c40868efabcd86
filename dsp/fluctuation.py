"""Per-firing-event crank-speed fluctuation: an indicated-work estimate from the crank's energy.

Method
------
Each tooth interval gives a mean crank speed ω = Δθ / period. With the slider-crank model the
kinetic energy of crank and reciprocating masses at the interval's mid-angle is
``E = ½ J(θ) ω²`` (:func:`dsp.kinematics.equivalent_inertia`). Because the reciprocating masses
are inside ``J(θ)``, the change of ``E`` over an angle span is exactly the work of the gas,
friction, load and driveline torques over that span: the reciprocating inertia torque, which
dominates the speed fluctuation at high rpm and low load, drops out. This is the energy form of
the published crank-speed methods (segment time over an expansion window, normalised by the
period cubed: SAE 900232 and successors), where ``Δ(ω²) ∝ (T_prev − T)/T³``.

For event ``k`` (cylinder ``c``, firing TDC at ``θ_k``) the window is ``[θ_k + start, θ_k + start +
length]``, the same length for every cylinder and placed relative to each cylinder's own TDC (so
uneven layouts are handled). The window's energy change ``ΔE_k`` still carries the loss torque
(friction, road load) and the bike's acceleration. Both are removed by a balance over the ``2h``
working cycles centred on the event (``h = trend_cycles``): with a constant loss torque and a linear
speed trend over that span, the gas work inside window ``k`` is

``W_k = x_k + (L/C) / (1 − nL/C) · mean_cycle_sum(x)``,  ``x_j = ΔE_j − s·L``,

where ``s`` is the mean energy slope over the span (J/deg), ``L`` the window length, ``C`` the
cycle and ``n`` the number of cylinders. ``W_k`` is in joules: an indicated-work estimate of the
window (plus a small offset from the compression work done outside the windows, the same for a
fired and a misfired event). It needs ``nL < C``; the default window keeps ``nL/C ≤ 3/4``.

The centre of the combustion torque around TDC (first moment of the torque ``dE/dθ`` plus the loss
torque, in excess of its median over the span) is kept per event: it moves later with a retarded
ignition and gives the observed firing interval.

:class:`FluctuationStage` streams (``push`` edges, get the events whose whole span has arrived);
:func:`event_fluctuation` does a whole run at once with identical numbers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.dsp.layout import firing_sequence
from crankbeat.errors import InputError

#: Span around each TDC over which the centre of the combustion torque is taken, degrees.
RISE_SPAN = (-45.0, 105.0)

#: The energy step of an event compares the crank's mean speed over the segment that starts this
#: many degrees after its TDC with the mean speed over the segment before that point. It needs
#: no inertia model and no loss balance: the slider-crank energy exchange is nearly symmetric
#: about the TDC and, like every other deterministic pattern (tooth spacing at the segment ends,
#: the other cylinders' strokes), it is the same cycle after cycle for a given cylinder, so the
#: misfire decision's same-cylinder baseline removes it.
STEP_OFFSET_DEG = 20.0
#: Length of each of the two segments, degrees: one stroke, so that the segment after takes in
#: the whole expansion stroke, where the burn gives its work (common practice: most of it within
#: about 90 deg after TDC), and the segment before the compression stroke; shorter (the mean firing
#: interval) where the cylinders fire closer than a stroke apart, so that a segment does not reach
#: past the next cylinder's TDC.
STEP_STROKE_DEG = 180.0

_BLOCK = 4096  # events computed per vectorised step (bounds the temporary arrays)

#: Raw per-event record of this stage (before any decision).
RAW_EVENT_DTYPE = np.dtype(
    [
        ("index", "i8"),  # global event index: cycle * n_cyl + position in the firing sequence
        ("cycle", "i8"),
        ("cylinder", "i2"),  # 1-based
        ("theta", "f8"),  # deg, unwrapped angle of this cylinder's firing TDC
        ("t", "f8"),  # s, time of the firing TDC (interpolated from the edges)
        ("rpm", "f8"),  # mean speed over the window
        ("energy", "f8"),  # J, mean kinetic energy ½Jω² over the window
        ("work", "f8"),  # J, indicated-work estimate of the window (see module docstring)
        ("swing", "f8"),  # J, energy change over the window minus the speed trend (no balance)
        ("step", "f8"),  # J, energy step across TDC (see STEP_OFFSET_DEG)
        ("rise_deg", "f8"),  # deg after TDC where the window's energy rise is centred
        ("usable", "?"),  # every input needed was there and valid
    ]
)


@dataclass(frozen=True)
class WindowSpec:
    """Where the per-event window sits, relative to each cylinder's firing TDC.

    Attributes
    ----------
    start_deg : float
        Window start after TDC, degrees (negative = before TDC).
    length_deg : float
        Window length, degrees; the same for every cylinder.
    smooth_deg : float
        Half-width of the box over which the energy is averaged at each window end, degrees
        (a few teeth: it averages the period quantisation and the tooth-spacing errors).
    trend_cycles : int
        ``h``: the loss torque and speed trend are balanced over ``2h`` working cycles around
        each event.
    """

    start_deg: float
    length_deg: float
    smooth_deg: float = 18.0
    trend_cycles: int = 2

    def __post_init__(self) -> None:
        if not self.length_deg > 0:
            raise InputError(f"window length_deg must be > 0, got {self.length_deg!r}")
        if not self.smooth_deg > 0:
            raise InputError(f"window smooth_deg must be > 0, got {self.smooth_deg!r}")
        if int(self.trend_cycles) != self.trend_cycles or self.trend_cycles < 1:
            raise InputError(f"trend_cycles must be an integer >= 1, got {self.trend_cycles!r}")


def default_window(engine: Engine) -> WindowSpec:
    """The default window of an engine: the expansion stroke, shortened for close firings.

    Length ``min(180°, 3/4 of the shortest firing interval)``, starting a quarter of its length
    before TDC so that the last, steepest part of the compression is inside (its work comes back
    in the expansion whether the cylinder fires or not). ``n·L/C ≤ 3/4`` always holds.
    """
    _, angles = firing_sequence(engine)
    iv = np.diff(np.concatenate((angles, [angles[0] + engine.cycle_deg])))
    length = float(min(180.0, 0.75 * float(np.min(iv))))
    return WindowSpec(start_deg=-0.25 * length, length_deg=length, smooth_deg=min(18.0, length / 8))


def _check_window(window: WindowSpec, engine: Engine) -> None:
    n, c = engine.n_cylinders, engine.cycle_deg
    if n * window.length_deg >= 0.95 * c:
        raise InputError(
            f"window length {window.length_deg} deg is too long for {n} cylinders in a {c:.0f} deg "
            "cycle: n*length must stay below 0.95*cycle"
        )


class FluctuationStage:
    """Streaming per-event indicated-work estimate.

    Parameters
    ----------
    engine : Engine
    pitch_deg : float
        Tooth pitch of the trigger wheel (360 / tooth positions), degrees.
    window : WindowSpec, keyword-only
        Defaults to :func:`default_window`.

    Notes
    -----
    ``push(t, angle, valid, period)`` takes the next tooth edges (arrays of equal length, as in
    :class:`dsp.crank.CrankAngles`) and returns the raw events (:data:`RAW_EVENT_DTYPE`) whose
    whole span, ``trend_cycles`` cycles after the window, has arrived. Events are returned in
    order, each exactly once, including unusable ones (sync lost, invalid edges), so that no event
    disappears. Memory is bounded by the span (a few cycles of edges).
    """

    def __init__(self, engine: Engine, pitch_deg: float, *, window: WindowSpec | None = None):
        if not 0 < pitch_deg <= 90:
            raise InputError(f"pitch_deg must be in (0, 90], got {pitch_deg!r}")
        self.engine = engine
        self.pitch = float(pitch_deg)
        self.window = window or default_window(engine)
        _check_window(self.window, engine)
        cyls, angles = firing_sequence(engine)
        self._seq_cyl = cyls.astype(np.int16)
        self._seq_deg = angles.astype(float)
        self._n = engine.n_cylinders
        self._C = engine.cycle_deg
        w = self.window
        h = w.trend_cycles
        # angle reach of one event's computation, relative to its TDC
        self._reach_lo = w.start_deg - h * self._C - w.smooth_deg
        self._step_len = min(STEP_STROKE_DEG, self._C / self._n)
        self._reach_hi = self._reach_ahead(angles)
        # samples per box / window gather (fixed sizes keep sums identical whatever the chunking)
        self._box_m = int(np.ceil(2 * w.smooth_deg / self.pitch)) + 3
        span_deg = max(w.length_deg + 2 * w.smooth_deg, 2 * self._step_len)
        self._win_m = int(np.ceil(span_deg / self.pitch)) + 4
        # J(θ) tabulated over the cycle every 0.05°: linear interpolation is exact to ~1e-8
        # relative (J is smooth; error ~ Δθ²·J''/8), and far cheaper than the slider-crank
        # expressions per tooth
        self._j_theta = np.linspace(0.0, self._C, int(round(self._C / 0.05)) + 1)
        self._j_table = equivalent_inertia(self._j_theta, engine)
        self._j_mean = float(np.mean(self._j_table))
        # edge buffer
        self._ang = np.empty(0)
        self._t = np.empty(0)
        self._ok = np.empty(0, dtype=bool)
        self._per = np.empty(0)
        self._mid = np.empty(0)
        self._e = np.empty(0)
        self._good = np.empty(0, dtype=bool)
        self._max_angle = -np.inf
        self._next: int | None = None  # next global event index to emit

    def _reach_ahead(self, seq_deg: np.ndarray) -> float:
        """Crank angle after an event's TDC that its computation reads, deg: the event waits
        for it (live latency), so it is what :meth:`_compute` reads and no more.

        The furthest reads: the energy at the window start ``h`` cycles on (the trend), the
        window end of the last window summed (``h`` cycles on less the shortest firing
        interval), the window and the energy step of the event itself and its torque centre;
        each box reads ``smooth_deg`` beyond its point. Beyond that, one tooth interval must
        have arrived (a box or a window needs a sample past its end to know it is complete):
        a gap is at most :meth:`_gap_teeth` pitches, so one more pitch than that.
        """
        w, h, C = self.window, self.window.trend_cycles, self._C
        iv = np.diff(np.concatenate((seq_deg, [seq_deg[0] + C])))
        far = max(
            h * C + w.start_deg + w.smooth_deg,
            h * C - float(np.min(iv)) + w.start_deg + w.length_deg + w.smooth_deg,
            w.start_deg + w.length_deg + w.smooth_deg,
            STEP_OFFSET_DEG + self._step_len,
            RISE_SPAN[1],
        )
        return far + (self._gap_teeth() + 1) * self.pitch

    # -- event geometry -------------------------------------------------------------------------
    def _event_theta(self, index: np.ndarray) -> np.ndarray:
        cyc = np.floor_divide(index, self._n)
        return cyc * self._C + self._seq_deg[index - cyc * self._n]

    def _first_index_after(self, angle: float) -> int:
        cyc = int(np.floor(angle / self._C))
        for k in range((cyc - 1) * self._n, (cyc + 2) * self._n):
            if self._event_theta(np.array([k]))[0] >= angle:
                return k
        return (cyc + 2) * self._n

    # -- streaming ------------------------------------------------------------------------------
    def push(
        self, t: np.ndarray, angle: np.ndarray, valid: np.ndarray, period: np.ndarray
    ) -> np.ndarray:
        t = np.asarray(t, dtype=float)
        angle = np.asarray(angle, dtype=float)
        valid = np.asarray(valid, dtype=bool)
        period = np.asarray(period, dtype=float)
        if not (t.shape == angle.shape == valid.shape == period.shape) or t.ndim != 1:
            raise InputError(
                f"t, angle, valid, period must be 1-d and of equal length, got shapes "
                f"{t.shape}, {angle.shape}, {valid.shape}, {period.shape}"
            )
        keep = np.isfinite(angle)
        # angles must increase: an edge at or behind the furthest angle seen is dropped
        if keep.any():
            cm = np.maximum.accumulate(np.where(keep, angle, -np.inf))
            prev = np.concatenate(([self._max_angle], cm[:-1]))
            prev = np.maximum(prev, self._max_angle)
            keep &= angle > prev
        if keep.any():
            n_old = self._ang.size
            self._ang = np.concatenate((self._ang, angle[keep]))
            self._t = np.concatenate((self._t, t[keep]))
            self._ok = np.concatenate((self._ok, valid[keep]))
            self._per = np.concatenate((self._per, period[keep]))
            # samples (one per tooth interval) depend on two edges only: computed once
            mid, e, good = self._make_samples(max(n_old - 1, 0), self._ang.size)
            self._mid = np.concatenate((self._mid, mid))
            self._e = np.concatenate((self._e, e))
            self._good = np.concatenate((self._good, good))
            self._max_angle = float(self._ang[-1])
            if self._next is None:
                self._next = self._first_index_after(float(self._ang[0]))
        return self._emit(final=False)

    def finish(self) -> np.ndarray:
        """Emit every event up to the last edge seen (the tail lacks look-ahead: unusable)."""
        return self._emit(final=True)

    def _emit(self, *, final: bool) -> np.ndarray:
        if self._next is None or self._ang.size < 2:
            return np.zeros(0, dtype=RAW_EVENT_DTYPE)
        last = self._max_angle
        limit = last - self._reach_hi if not final else last - self.window.start_deg
        hi = self._first_index_after(limit)  # events < hi are ready
        if hi <= self._next:
            return np.zeros(0, dtype=RAW_EVENT_DTYPE)
        parts = []
        for b0 in range(self._next, hi, _BLOCK):
            idx = np.arange(b0, min(b0 + _BLOCK, hi), dtype=np.int64)
            parts.append(self._compute(idx))
        self._next = hi
        self._trim()
        return np.concatenate(parts)

    def _trim(self) -> None:
        assert self._next is not None
        lo_angle = float(self._event_theta(np.array([self._next]))[0]) + self._reach_lo
        cut = int(np.searchsorted(self._ang, lo_angle - 4 * self.pitch)) - 1
        if cut > 0:
            self._ang = self._ang[cut:]
            self._t = self._t[cut:]
            self._ok = self._ok[cut:]
            self._per = self._per[cut:]
            self._mid = self._mid[cut:]
            self._e = self._e[cut:]
            self._good = self._good[cut:]

    # -- the computation ------------------------------------------------------------------------
    def _samples(self, s0: int, s1: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Mid-angle, kinetic energy and goodness of each tooth interval of buffer[s0:s1]."""
        return self._mid[s0 : s1 - 1], self._e[s0 : s1 - 1], self._good[s0 : s1 - 1]

    def _make_samples(self, s0: int, s1: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        a, t, ok, per = self._ang[s0:s1], self._t[s0:s1], self._ok[s0:s1], self._per[s0:s1]
        da = np.diff(a)
        dt = np.where(np.isfinite(per[1:]) & (per[1:] > 0), per[1:], np.diff(t))
        mid = 0.5 * (a[1:] + a[:-1])
        # an interval longer than a gap plus a tooth means edges are missing in between
        wide = (self._gap_teeth() + 0.5) * self.pitch
        good = ok[1:] & ok[:-1] & (dt > 0) & (da > 0) & (da < wide)
        omega = np.deg2rad(np.where(good, da / np.where(dt > 0, dt, 1.0), 0.0))
        J = np.interp(np.mod(mid, self._C), self._j_theta, self._j_table)
        energy = np.where(good, 0.5 * J * omega**2, 0.0)
        return mid, energy, good

    def _gap_teeth(self) -> int:
        # the widest legitimate interval of any wheel: the gap of a 60-2 is 3 pitches; allow 4
        return 4

    def _box(self, mid: np.ndarray, e: np.ndarray, good: np.ndarray, p: np.ndarray):
        """Mean energy of the good samples within ±smooth of each point p; NaN if not clean."""
        w = self.window.smooth_deg
        i0 = np.searchsorted(mid, p - w, side="left")
        i1 = np.searchsorted(mid, p + w, side="right")
        j = i0[:, None] + np.arange(self._box_m)[None, :]
        inside = j < i1[:, None]
        jc = np.minimum(j, mid.size - 1)
        g = inside & good[jc]
        bad = inside & ~good[jc]
        cnt = g.sum(axis=1)
        val = np.where(g, e[jc], 0.0).sum(axis=1)
        clean = (cnt >= 1) & ~bad.any(axis=1) & (i1 - i0 <= self._box_m)
        # the box must reach both sides of p (no hole in the coverage)
        clean &= (i0 > 0) & (i1 < mid.size)
        return np.where(clean, val / np.maximum(cnt, 1), np.nan)

    def _compute(self, idx: np.ndarray) -> np.ndarray:
        out = np.zeros(idx.size, dtype=RAW_EVENT_DTYPE)
        n, C, w = self._n, self._C, self.window
        h, L = w.trend_cycles, w.length_deg
        cyc = np.floor_divide(idx, n)
        pos = idx - cyc * n
        theta = cyc * C + self._seq_deg[pos]
        out["index"] = idx
        out["cycle"] = cyc
        out["cylinder"] = self._seq_cyl[pos]
        out["theta"] = theta
        margin = 8 * self.pitch
        s0 = max(int(np.searchsorted(self._ang, theta[0] + self._reach_lo - margin)) - 1, 0)
        s1 = int(np.searchsorted(self._ang, theta[-1] + self._reach_hi + margin)) + 1
        a, t = self._ang[s0:s1], self._t[s0:s1]
        out["t"] = _time_at(theta, a, t)
        pa = theta + w.start_deg
        pb = pa + L
        ta, tb = _interp_or_nan(pa, a, t), _interp_or_nan(pb, a, t)
        out["rpm"] = L / 6.0 / (tb - ta)
        out["step"] = self._step(theta, a, t)
        if a.size < 3:
            out["work"] = np.nan
            out["swing"] = np.nan
            out["energy"] = np.nan
            out["rise_deg"] = np.nan
            return out
        mid, e, good = self._samples(s0, s1)
        # energy at every window start needed: events idx - n*h .. idx + n*h (same cylinder)
        span = np.arange(idx[0] - n * h, idx[-1] + n * h + 1, dtype=np.int64)
        th_span = self._event_theta(span) + w.start_deg
        ea = self._box(mid, e, good, th_span)
        eb = self._box(mid, e, good, th_span + L)
        de = eb - ea
        off = n * h
        k = np.arange(idx.size) + off
        # energy trend over the widest symmetric span (h, h-1, ... cycles each side) whose ends
        # are clean: a lost frame near one end does not cost the event
        slope = np.full(idx.size, np.nan)
        for hh in range(h, 0, -1):
            d = (ea[k + n * hh] - ea[k - n * hh]) / (2 * hh * C)
            slope = np.where(np.isfinite(slope), slope, d)
        # sum of the 2hn window changes of the span, by a fixed-length gather; a window hit by
        # bad edges is replaced by the mean of the same cylinder's other windows in the span
        g = (k - n * h)[:, None] + np.arange(2 * n * h)[None, :]
        de_g = de[g].reshape(idx.size, 2 * h, n)
        have = np.isfinite(de_g)
        per_pos = np.where(have, de_g, 0.0).sum(axis=1) / np.maximum(have.sum(axis=1), 1)
        per_pos = np.where(have.any(axis=1), per_pos, np.nan)
        s_win = per_pos.sum(axis=1) * (2 * h)
        x = de[k] - slope * L
        sum_x = s_win - 2 * h * n * slope * L
        frac = L / C
        work = x + frac / (1.0 - n * frac) * sum_x / (2 * h)
        # centre of the gas work inside the window: per-sample energy changes plus the loss
        # loss torque (friction, load), J/deg: the cycle's gas work minus the trend
        loss = sum_x / (2 * h) / (1.0 - n * frac) / C - slope
        rise = self._rise(mid, e, good, theta + RISE_SPAN[0], theta + RISE_SPAN[1], -loss)
        energy_mean, clean_win = self._window(mid, e, good, pa, pb)
        mid_step = theta + STEP_OFFSET_DEG
        _, clean_step = self._window(mid, e, good, mid_step - self._step_len,
                                     mid_step + self._step_len)
        out["step"] = np.where(clean_step, out["step"], np.nan)
        usable = np.isfinite(work) & clean_win & np.isfinite(out["step"])
        out["work"] = np.where(usable, work, np.nan)
        out["swing"] = np.where(usable, x, np.nan)
        out["energy"] = energy_mean
        out["rise_deg"] = np.where(usable, rise - theta, np.nan)
        out["usable"] = usable & np.isfinite(out["t"]) & np.isfinite(out["rpm"])
        return out

    def _step(self, theta: np.ndarray, a: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Energy step across each event, J: ½·J̄·(ω̄²after − ω̄²before), J̄ the rig's mean
        inertia (only a scale: the decision works in each cylinder's own robust spread)."""
        L = self._step_len
        c = theta + STEP_OFFSET_DEG
        t0, t1, t2 = (_interp_or_nan(c + d, a, t) for d in (-L, 0.0, L))
        with np.errstate(invalid="ignore", divide="ignore"):
            w_before = np.deg2rad(L / (t1 - t0))
            w_after = np.deg2rad(L / (t2 - t1))
        return 0.5 * self._j_mean * (w_after**2 - w_before**2)

    def _gather(self, mid, good, pa, pb):
        i0 = np.searchsorted(mid, pa, side="left")
        i1 = np.searchsorted(mid, pb, side="right")
        j = (i0 - 1)[:, None] + np.arange(self._win_m)[None, :]
        inside = (j >= i0[:, None] - 1) & (j < i1[:, None]) & (j >= 0)
        jc = np.clip(j, 0, mid.size - 1)
        jn = np.minimum(jc + 1, mid.size - 1)
        pair = inside & (j + 1 < mid.size) & (j + 1 <= i1[:, None])
        pair_ok = pair & good[jc] & good[jn]
        clean = ~(pair & ~pair_ok).any(axis=1) & (i1 - i0 + 2 <= self._win_m) & (i1 > i0)
        return jc, jn, inside, pair_ok, clean

    def _window(self, mid, e, good, pa, pb):
        """Mean energy over each window and whether the window is free of bad samples."""
        jc, _, inside, pair_ok, clean = self._gather(mid, good, pa, pb)
        use = good[jc] & inside
        cnt = use.sum(axis=1)
        emean = np.where(use, e[jc], 0.0).sum(axis=1) / np.maximum(cnt, 1)
        return np.where(cnt > 0, emean, np.nan), clean & (pair_ok.sum(axis=1) > 0)

    def _rise(self, mid, e, good, pa, pb, slope):
        """Centre of the combustion torque over each span [pa, pb], degrees (absolute)."""
        jc, jn, _, pair_ok, _ = self._gather(mid, good, pa, pb)
        dth = np.where(pair_ok, mid[jn] - mid[jc], 0.0)
        d_e = np.where(pair_ok, e[jn] - e[jc], 0.0) - slope[:, None] * dth
        c = np.where(pair_ok, 0.5 * (mid[jn] + mid[jc]) - pa[:, None], 0.0)
        # centre of the torque in excess of the span's median torque: the combustion pulse
        # stands out of the slow torques (load, pumping, the other cylinders), and the median
        # ignores the pulse itself
        tq = np.where(pair_ok, d_e / np.where(dth > 0, dth, 1.0), np.inf)
        srt = np.sort(tq, axis=1)  # the missing ones (inf) sort last
        cnt = pair_ok.sum(axis=1)
        rows = np.arange(tq.shape[0])
        lo = srt[rows, np.maximum((cnt - 1) // 2, 0)]
        hi = srt[rows, np.maximum(cnt // 2, 0)]
        med = np.where(cnt > 0, 0.5 * (lo + hi), 0.0)
        tq = np.where(pair_ok, tq, 0.0)
        med = np.where(np.isfinite(med), med, 0.0)
        wgt = np.where(pair_ok, np.maximum(tq - med[:, None], 0.0) * dth, 0.0)
        m0 = wgt.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            rise = pa + (c * wgt).sum(axis=1) / m0
        return np.where(m0 > 0, rise, np.nan)


def _time_at(theta: np.ndarray, a: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Time of each angle: interpolated between edges, or carried on at the speed of the nearest
    few edges just beyond the first or last one (the run's ends: every event gets a time)."""
    out = _interp_or_nan(theta, a, t)
    ok = np.isfinite(a) & np.isfinite(t)
    a, t = a[ok], t[ok]
    if a.size < 4:
        return out
    lo, hi = theta < a[0], theta > a[-1]
    out[lo] = t[0] - (a[0] - theta[lo]) * (t[3] - t[0]) / (a[3] - a[0])
    out[hi] = t[-1] + (theta[hi] - a[-1]) * (t[-1] - t[-4]) / (a[-1] - a[-4])
    return out


def _interp_or_nan(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    if xp.size < 2:
        return np.full(np.shape(x), np.nan)
    y = np.interp(x, xp, fp)
    return np.where((x >= xp[0]) & (x <= xp[-1]), y, np.nan)


def event_fluctuation(
    t: np.ndarray,
    angle: np.ndarray,
    valid: np.ndarray,
    period: np.ndarray,
    engine: Engine,
    *,
    pitch_deg: float,
    window: WindowSpec | None = None,
) -> np.ndarray:
    """Whole-run version of :class:`FluctuationStage`: the same raw events, identical numbers.

    Parameters
    ----------
    t, angle, valid, period : (n,) arrays
        Tooth edge times (s), unwrapped crank angles (deg, NaN unsynced), validity and the period
        ending at each edge (s), as in :class:`dsp.crank.CrankAngles`.
    engine : Engine
    pitch_deg : float, keyword-only
        Tooth pitch, degrees.
    window : WindowSpec, keyword-only

    Returns
    -------
    events : ndarray of :data:`RAW_EVENT_DTYPE`, one per firing event in the angle range.
    """
    stage = FluctuationStage(engine, pitch_deg, window=window)
    return np.concatenate((stage.push(t, angle, valid, period), stage.finish()))
