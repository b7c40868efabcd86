"""Tooth spacing errors of the trigger wheel, learnt while no cylinder fires.

Method
------
On closed-throttle fuel cut the crank is driven by the wheel and braked by friction; what is left
of its speed fluctuation has two sources that differ from the tooth errors in how they scale:

* the compression and expansion of the trapped air, a torque of fixed shape in crank angle:
  its relative speed swing scales as 1/ω²;
* the reciprocating inertia: without a torque ½ J(θ) ω² is constant, so log ω = -½ log J(θ)
  + const, the same at every speed (:func:`dsp.kinematics.equivalent_inertia` gives J(θ)).

Tooth errors are fixed in angle and the same every revolution. For each revolution ``r`` and
the period ending at tooth ``n`` the model is, with ``s_n`` the true spacing and ``s0_n`` the
nominal one::

    log p[r,n] - log s0_n - ½ log J(θ) + g_r u_n
        = z_n + c_r + Σ_h (a_h cos(hθ/2) + b_h sin(hθ/2)) / ω̄_r²

with ``z_n = log(s_n / s0_n)``, a per-revolution level ``c_r``, the speed trend ``g_r`` (log
speed change per revolution, from the two neighbouring revolutions; ``u`` is the angle from the
revolution's middle in revolutions) and a half-order harmonic series of the cycle scaled by
1/ω̄² for the air spring. It is linear in every unknown: each revolution's level is projected
out and the normal equations of the rest are accumulated, so memory stays fixed however long
the fuel cut lasts. The free
constant of ``z`` is fixed by the spacings summing to 360° (tests/reference: common practice);
``error_deg[n]`` is then the position of tooth n minus ``n · pitch``, tooth 0 being the reference.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.crank import CrankAngles, ToothWheel
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.errors import InputError

__all__ = ["ToothErrors", "ToothErrorLearner", "learn_tooth_errors"]


@dataclass(frozen=True)
class ToothErrors:
    """Learnt tooth position errors.

    Attributes
    ----------
    error_deg : (real_teeth,) float64
        Position of each tooth's falling edge minus its nominal ``n * pitch``, deg (tooth 0 = 0).
        Give it to :class:`dsp.crank.CrankTracker` as ``tooth_correction_deg``.
    n_revolutions : int
        Revolutions the estimate rests on.
    rms_deg : float
        r.m.s. of ``error_deg``.
    confidence : float
        0..1: rms² / (rms² + mean squared standard error), times how well the speeds seen
        separate the air spring from the teeth (a spread of 1/ω² of 25 % or more counts fully).
    se_deg : float
        r.m.s. standard error of ``error_deg`` from the fit residuals.
    rpm_range : tuple of float
        Lowest and highest revolution mean speed used, rpm.
    """

    error_deg: np.ndarray
    n_revolutions: int
    rms_deg: float
    confidence: float
    se_deg: float = np.nan
    rpm_range: tuple[float, float] = (np.nan, np.nan)


def _spans_mask(t: np.ndarray, spans) -> np.ndarray:
    sp = np.asarray(spans, dtype=float).reshape(-1, 2)
    if np.any(sp[:, 1] < sp[:, 0]):
        raise InputError("no-combustion spans must be (start, end) pairs with end >= start, s")
    mask = np.zeros(len(t), bool)
    for a, b in sp:
        mask |= (t >= a) & (t <= b)
    return mask


class ToothErrorLearner:
    """Streaming tooth-error estimate from crank angles on fuel cut.

    Parameters
    ----------
    wheel : ToothWheel
    engine : Engine
    harmonics : int, keyword-only
        Half-orders of the cycle in the air-spring model (orders 0.5 .. harmonics/2).
    inertia : {"model", "none"}, keyword-only
        ``"model"`` removes the slider-crank inertia swing; ``"none"`` leaves it to the fit
        (it then has to be absorbed by the harmonics, which only works at one speed).
    min_revolutions : int
        Revolutions below which ``confidence`` is scaled down.
    """

    def __init__(self, wheel: ToothWheel, engine: Engine, *, harmonics: int = 16,
                 inertia: str = "model", min_revolutions: int = 50) -> None:
        if not isinstance(wheel, ToothWheel):
            wheel = ToothWheel.like(wheel)
        if harmonics < 0:
            raise InputError(f"harmonics must be >= 0, got {harmonics!r}")
        if inertia not in ("model", "none"):
            raise InputError(f"inertia must be 'model' or 'none', got {inertia!r}")
        self.wheel, self.engine = wheel, engine
        self.L = wheel.real_teeth
        self.H = int(harmonics)
        self.inertia = inertia
        self.min_revs = int(min_revolutions)
        pitch = wheel.pitch_deg
        self.s0 = np.full(self.L, pitch)
        self.s0[0] = (wheel.missing + 1) * pitch  # the period ending at tooth 0 spans the gap
        self.K = self.L + 2 * self.H
        self.XtX = np.zeros((self.K, self.K))
        self.Xty = np.zeros(self.K)
        self.yty = 0.0
        self.n_rows = 0
        self.n_revs = 0
        self.w_ref: float | None = None
        self.rpm_lo, self.rpm_hi = np.inf, -np.inf
        self.s_sum = 0.0
        self.s_sq = 0.0
        self.tail: tuple[np.ndarray, ...] | None = None  # partial revolution held between pushes

    def push(self, angles: CrankAngles, no_combustion) -> None:
        """Add the whole fuel-cut revolutions of ``angles``.

        Parameters
        ----------
        angles : CrankAngles
            The tracker's output (any chunk of it, in order).
        no_combustion : (n,) bool array or (m, 2) array of (start, end) times in s
            Edges (or time spans) during which no cylinder fires, e.g. closed throttle with the
            ECU's overrun fuel cut above idle: the caller decides from the status frames.
        """
        t = np.asarray(angles.t, dtype=float)
        nc = np.asarray(no_combustion)
        if nc.dtype == bool and nc.shape == t.shape:
            mask = nc
        elif nc.ndim == 2 and nc.shape[1] == 2 or nc.size == 0:
            mask = _spans_mask(t, nc)
        else:
            raise InputError(
                f"no_combustion must be a bool mask of shape {t.shape} or (m, 2) time spans, "
                f"got dtype {nc.dtype} shape {nc.shape}"
            )
        cols = (angles.tooth.astype(np.int64), angles.angle, angles.period,
                angles.valid & mask & np.isfinite(angles.period))
        if self.tail is not None:
            cols = tuple(np.concatenate((a, b)) for a, b in zip(self.tail, cols))
        tooth, ang, per, ok = cols
        L = self.L
        # whole revolutions: L consecutive good edges numbered 0..L-1
        good = ok & (tooth >= 0)
        starts = np.flatnonzero(good & (tooth == 0))
        n = len(tooth)
        complete = starts[starts + L <= n]
        pending = starts[starts + L > n]
        keep_from = int(pending[0]) if len(pending) else n
        if len(complete):
            rows = complete[:, None] + np.arange(L)
            whole = np.all(good[rows] & (tooth[rows] == np.arange(L)), axis=1)
            st = complete[whole]
            # the speed trend through a revolution comes from its two neighbours, so a
            # revolution is used once both are in hand (a free slope per revolution would
            # swallow any tooth pattern that grows linearly round the wheel)
            has_prev = np.isin(st - L, st)
            has_next = np.isin(st + L, st)
            use = np.flatnonzero(has_prev & has_next)
            if len(use):
                lw = np.log(360.0 / per[st[:, None] + np.arange(L)].sum(axis=1))
                pos = {int(v): i for i, v in enumerate(st)}
                prev_i = np.array([pos[int(st[i] - L)] for i in use])
                next_i = np.array([pos[int(st[i] + L)] for i in use])
                slope = 0.5 * (lw[next_i] - lw[prev_i])  # log speed change per revolution
                r = st[use]
                for i in range(0, len(r), 256):  # bounded working memory per call
                    rr = r[i:i + 256, None] + np.arange(L)
                    self._accumulate(ang[rr], per[rr], slope[i:i + 256])
            if len(st):
                # the last revolution still needs its successor, and that one its predecessor
                last = len(st) - 1
                keep = st[last - 1] if last >= 1 and st[last - 1] == st[last] - L else st[last]
                keep_from = min(keep_from, int(keep))
        self.tail = tuple(a[keep_from:] for a in cols)

    def _accumulate(self, ang: np.ndarray, per: np.ndarray, slope: np.ndarray) -> None:
        L, H = self.L, self.H
        m = ang.shape[0]
        theta = ang - 0.5 * self.s0  # mid-angle of each period, deg (engine angle)
        u = (theta - theta.mean(axis=1, keepdims=True)) / 360.0
        # -log(omega) carries the trend with a minus sign
        y = np.log(per) - np.log(self.s0) + slope[:, None] * u
        if self.inertia == "model":
            y -= 0.5 * np.log(equivalent_inertia(theta, self.engine))
        w_mean = 360.0 / per.sum(axis=1)  # deg/s, mean over the revolution
        if self.w_ref is None:
            self.w_ref = float(np.median(w_mean))
        scale = (self.w_ref / w_mean) ** 2
        rpm = w_mean / 6.0
        self.rpm_lo, self.rpm_hi = min(self.rpm_lo, rpm.min()), max(self.rpm_hi, rpm.max())
        self.s_sum += float(scale.sum())
        self.s_sq += float((scale**2).sum())
        # project out each revolution's level; the tooth columns are one-hot, so their blocks of
        # the normal equations are known in closed form and only the harmonics need products
        y = y - y.mean(axis=1, keepdims=True)
        XtX = np.zeros((self.K, self.K))
        Xty = np.zeros(self.K)
        XtX[:L, :L] = m * (np.eye(L) - 1.0 / L)
        Xty[:L] = y.sum(axis=0)
        if H:
            Hm = _harmonic_columns(theta, H, scale)
            Hm -= Hm.mean(axis=1, keepdims=True)
            Hf = Hm.reshape(-1, 2 * H)
            XtX[:L, L:] = Hm.sum(axis=0)
            XtX[L:, :L] = XtX[:L, L:].T
            XtX[L:, L:] = Hf.T @ Hf
            Xty[L:] = Hf.T @ y.reshape(-1)
        self.XtX += XtX
        self.Xty += Xty
        yf = y.reshape(-1)
        self.yty += float(yf @ yf)
        self.n_rows += len(yf)
        self.n_revs += m

    def result(self) -> ToothErrors:
        """The current estimate (zeros and confidence 0 before any revolution)."""
        L = self.L
        if self.n_revs == 0:
            return ToothErrors(np.zeros(L), 0, 0.0, 0.0)
        A = self.XtX
        beta, _, rank, _ = np.linalg.lstsq(A, self.Xty, rcond=1e-10)
        z = beta[:L]
        z = z + np.log(360.0 / np.sum(self.s0 * np.exp(z)))  # spacings sum to one revolution
        s = self.s0 * np.exp(z)
        pos = np.concatenate(([0.0], np.cumsum(s[1:])))  # tooth n position after tooth 0
        err = pos - np.arange(L) * self.wheel.pitch_deg
        dof = max(self.n_rows - rank - self.n_revs, 1)
        sigma2 = max(self.yty - float(beta @ self.Xty), 0.0) / dof
        cov = sigma2 * np.linalg.pinv(A, rcond=1e-10)[:L, :L]
        # error positions are sums of spacings: e_n = Σ_{j=1..n} s0_j z_j (first order)
        Tm = np.tril(np.ones((L, L)))
        Tm[:, 0] = 0.0
        Tm *= self.s0
        cov_e = Tm @ cov @ Tm.T
        se = float(np.sqrt(np.mean(np.clip(np.diag(cov_e)[1:], 0, None)))) if L > 1 else 0.0
        rms = float(np.sqrt(np.mean(err**2)))
        snr = rms**2 / (rms**2 + se**2) if rms > 0 else 0.0
        mean_s = self.s_sum / self.n_revs
        spread = np.sqrt(max(self.s_sq / self.n_revs - mean_s**2, 0.0)) / mean_s
        separable = min(1.0, spread / 0.25) if self.H else 1.0
        conf = snr * separable * min(1.0, self.n_revs / self.min_revs)
        return ToothErrors(err, self.n_revs, rms, float(conf), se,
                           (float(self.rpm_lo), float(self.rpm_hi)))


def _harmonic_columns(theta: np.ndarray, H: int, scale: np.ndarray) -> np.ndarray:
    """cos(h·θ/2) and sin(h·θ/2) for h = 1..H, times each row's ``scale``: (m, L, 2H).

    Powers of one complex exponential, multiplied out in real arithmetic straight into the
    result's columns; the same products as numpy's complex ``cumprod`` (bit for bit), without
    its complex temporaries and the copy that joined real and imaginary parts.
    """
    e1 = np.exp(0.5j * np.deg2rad(theta))
    out = np.empty(theta.shape + (2 * H,))
    sc = scale[:, None]
    er, ei = e1.real, e1.imag
    pr, pi = er, ei
    for h in range(H):
        if h:
            pr, pi = pr * er - pi * ei, pr * ei + pi * er
        np.multiply(pr, sc, out=out[..., h])
        np.multiply(pi, sc, out=out[..., H + h])
    return out


def learn_tooth_errors(angles: CrankAngles, no_combustion, wheel: ToothWheel, engine: Engine,
                       **options) -> ToothErrors:
    """Whole-array tooth-error estimate: :class:`ToothErrorLearner` fed once."""
    learner = ToothErrorLearner(wheel, engine, **options)
    learner.push(angles, no_combustion)
    return learner.result()
