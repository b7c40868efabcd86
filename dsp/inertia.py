"""The effective rotating inertia the crank-speed data shows (beside the rig file's value).

Method
------
The kinetic energy of crank and reciprocating masses is ``E = J0·u + v`` with ``u = ½ω²`` and
``v = ½ Jr(θ) ω²``, where ``Jr(θ) = J(θ) − J0`` is the reciprocating part of the slider-crank
inertia (:func:`dsp.kinematics.equivalent_inertia`, known from the geometry) and ``J0`` the
constant part (crank, flywheel, and whatever the clutch and gearbox add). Within one working cycle
the true energy changes only through the gas, friction and load torques; at high speed the
reciprocating part dominates the speed fluctuation, and ``u`` and ``v`` then swing against each
other so that ``E`` stays smooth: ``J0·u' ≈ −v'`` (primes: each cycle's values minus their own
straight-line trend). The least-squares slope over the cycles at or above ``min_rpm`` gives
``J0 = −Σu'v' / Σu'u'``.

The gas torque left in ``E`` biases the estimate (it is not zero at any load), and tooth-spacing
errors inflate ``Σu'u'`` (speeds are taken over spans of a few teeth to limit that): measured on
simulated rides of the four at 8000-10400 rpm and light load, within -30..+25 % of the true value
on wheels with errors up to 0.1 deg rms, but 70 % low with 0.13 deg and a soft driveline. Where
the layout's reciprocating patterns cancel (a 270 deg twin: the second orders of its two
cylinders are in antiphase) there is nothing to weigh against and no estimate is given. The
figure is for the notes and a rig's trend, never an input of the misfire decision (which does not
need the inertia to be right).
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.errors import InputError


class InertiaEstimator:
    """Streaming estimate of the constant inertia ``J0`` (kg·m²) from crank edges.

    Parameters
    ----------
    engine : Engine
    pitch_deg : float
        Tooth pitch, degrees.
    min_rpm : float, keyword-only
        Cycles with a lower mean speed are left out (the gas torque dominates there).
    span_deg : float, keyword-only
        Speeds are taken over spans of about this many degrees (whole teeth).
    min_cycles : int, keyword-only
        Cycles needed before :meth:`result` gives a figure.
    """

    def __init__(self, engine: Engine, pitch_deg: float, *, min_rpm: float = 7000.0,
                 span_deg: float = 30.0, min_cycles: int = 40) -> None:
        if not 0 < pitch_deg <= 90:
            raise InputError(f"pitch_deg must be in (0, 90], got {pitch_deg!r}")
        self.C = float(engine.cycle_deg)
        self.min_rpm = float(min_rpm)
        self.min_cycles = int(min_cycles)
        self._m = max(1, int(round(span_deg / pitch_deg)))
        self._expected = self.C / pitch_deg
        theta = np.linspace(0.0, self.C, int(round(self.C / 0.25)) + 1)
        self._jr_theta = theta
        self._jr = np.asarray(equivalent_inertia(theta, engine)) - engine.inertia_kgm2
        # layouts whose cylinders' reciprocating patterns cancel (a 270 deg twin's second order)
        # leave nothing to weigh the inertia against: no estimate there
        # (its relative swing is about 0.7 for one cylinder or a flat-plane four, 0.18 for the
        # 270 deg twin: computed from the slider-crank table above)
        self.usable = bool(np.std(self._jr) > 0.4 * np.mean(self._jr))
        self._ang = np.empty(0)
        self._t = np.empty(0)
        self._suu = 0.0
        self._suv = 0.0
        self.cycles = 0

    def push(self, t, angle, valid) -> None:
        """Take the next tooth edges (times s, unwrapped angles deg, validity)."""
        t = np.asarray(t, float)
        angle = np.asarray(angle, float)
        ok = np.asarray(valid, bool) & np.isfinite(angle) & np.isfinite(t)
        if not ok.any():
            return
        self._ang = np.concatenate((self._ang, angle[ok]))
        self._t = np.concatenate((self._t, t[ok]))
        # whole cycles only, each span of m teeth counted in the cycle where it starts: a cycle
        # is taken once the next one has m edges (its last spans end there); the buffer then
        # starts at a cycle boundary, so chunking does not change which spans a cycle holds
        last = np.floor(self._ang[-1] / self.C)
        cut = int(np.searchsorted(self._ang, last * self.C))
        if cut > 0 and self._ang.size - cut > self._m:
            self._cycles(self._ang[: cut + self._m], self._t[: cut + self._m])
            self._ang, self._t = self._ang[cut:], self._t[cut:]

    def _cycles(self, ang: np.ndarray, t: np.ndarray) -> None:
        m = self._m
        da, dt = ang[m:] - ang[:-m], t[m:] - t[:-m]
        mid = 0.5 * (ang[m:] + ang[:-m])
        good = (dt > 0) & (da < m * 4 * self.C / self._expected)  # no edges missing inside
        cyc = np.floor(ang[:-m] / self.C)
        mid, cyc = mid[good], cyc[good]
        if not mid.size:
            return
        omega = np.deg2rad(da[good] / dt[good])
        u = 0.5 * omega**2
        v = 0.5 * np.interp(np.mod(mid, self.C), self._jr_theta, self._jr) * omega**2
        starts = np.flatnonzero(np.r_[True, cyc[1:] != cyc[:-1]])
        cnt = np.diff(np.r_[starts, mid.size]).astype(float)
        x = mid - cyc * self.C  # angle within the cycle (a span's mid may pass its end)

        def sums(a):
            return np.add.reduceat(a, starts)

        sx, sxx = sums(x), sums(x * x)
        su, sv = sums(u), sums(v)
        sxu, sxv, suu, suv = sums(x * u), sums(x * v), sums(u * u), sums(u * v)
        with np.errstate(invalid="ignore", divide="ignore"):
            vxx = sxx - sx * sx / cnt
            cxu, cxv = sxu - sx * su / cnt, sxv - sx * sv / cnt
            ruu = suu - su * su / cnt - cxu * cxu / vxx  # Σu'u' after each cycle's line
            ruv = suv - su * sv / cnt - cxu * cxv / vxx
            rpm = np.sqrt(2.0 * su / cnt) * 30.0 / np.pi
        # whole cycles at speed only (a gap or a partial cycle at either end is left out)
        whole = (cnt >= 0.9 * (self._expected - m)) & (rpm >= self.min_rpm) & np.isfinite(ruv)
        self._suu += float(ruu[whole].sum())
        self._suv += float(ruv[whole].sum())
        self.cycles += int(whole.sum())

    def why_none(self) -> str | None:
        """Why :meth:`result` gives no figure (None when it gives one)."""
        if not self.usable:
            return ("not estimated: this layout's reciprocating patterns cancel, so the crank "
                    "speed shows nothing to weigh the inertia against")
        if self.cycles < self.min_cycles or not self._suu > 0:
            return (f"not estimated: {self.cycles} whole cycles at or above "
                    f"{self.min_rpm:.0f} rpm, {self.min_cycles} needed")
        return None

    def result(self) -> float | None:
        """``J0`` estimate, kg·m², or None before ``min_cycles`` cycles at speed."""
        if self.why_none() is not None:
            return None
        return -self._suv / self._suu
