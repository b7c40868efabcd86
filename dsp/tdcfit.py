"""Cylinder 1's TDC on the wheel, from the crank speed while no cylinder fires.

Method
------
When nothing fires (closed throttle, overrun fuel cut) each cylinder only compresses and
re-expands its charge: the crank slows into every firing TDC and recovers after it, and near
TDC this compression dip is symmetric about TDC (the cylinder's torque is the pressure force
times a lever that vanishes at TDC and is odd about it; common practice for finding TDC on a
motored engine). A wrong ``tdc_offset_deg`` moves the dips off the angles the rig expects; the
symmetry point of the dips, averaged over many cycles, is the correction.

1. Speed that repeats every revolution at every speed (tooth spacing errors, the reciprocating
   inertia swing) is removed with the tooth-error model of :mod:`dsp.toothcal` (with its inertia
   left to the fit, so that nothing here depends on the TDC under test).
2. What is left, scaled by the revolution's mean speed squared, is the charge's energy swing
   ``q(θ)``: the same curve at any speed.
3. Around each cylinder's firing TDC (``window_deg`` either side) ``q`` is fitted by a level and
   a slope of its own per window (the other cylinders' pumping and the speed trend, smooth over
   the window) plus a shape shared by all windows that is even about ``e``: ``(u - e)²``,
   ``(u - e)⁴``. The ``e`` with the least squared residual is the estimate; the search runs over
   ``±search_deg`` around the rig's value (further out the dip's own mirror points, BDC and the
   next cylinder, compete).
4. Its standard error is the jackknife over blocks of cycles (delete one block, refit).

What pulls the dip off TDC (measured on simulated overrun rides, 2200-4500 rpm, capture-timer
periods quantised to 1 us; seeds 7-9):

* the driveline, in gear: its damping answers the dip with a speed that follows the crank's
  angle lag, an odd term that tilts the dip late-side down (-0.8 to -1.2 deg on the 180 deg twin
  in 4th; +0.0 +-0.1 with the clutch open). The rig check therefore uses the stretches in
  neutral when the log has them, and says when it had to use a stretch in gear;
* a cylinder passing its gas-exchange TDC at this firing TDC (the 360 deg twin, the flat-plane
  four): after its TDC its intake stroke pulls against manifold vacuum, before it the exhaust
  pushed at about ambient, so its torque is one-sided about the very TDC sought and the dip
  leans early (-0.8 to -1.5 deg, in neutral too). A shape with this one-sided term fitted
  freely cannot be told from a shift (standard error 5 deg; with the pressure easing to the
  manifold's over the first 40 deg of the intake stroke, the simulator's own model, the 360 deg
  twin lands at +0.2..+0.4 deg but the flat-plane four runs to the search edge, and a rig file
  holds no valve timing), so it is flagged (``partner_exchange``) and not corrected;
* heat lost at TDC (expansion below compression): +0.4 to +0.7 deg on the 270 deg and V twins.

The half-width of 40 deg keeps the jackknife standard error near 0.1 deg on a 60-2 wheel and
0.3 deg on a 36-1 wheel (at 30 deg: 0.3 and 2 deg; the dip's position is read from its
fourth and sixth powers, the second is shared with the free slope).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import uniform_filter1d

from crankbeat.dsp.crank import CrankAngles, ToothWheel
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import firing_angles
from crankbeat.dsp.toothcal import ToothErrorLearner
from crankbeat.errors import InputError

__all__ = ["TdcEstimate", "tdc_from_motoring", "partner_exchange_deg"]

#: even powers in the shared dip shape: (u - e)², (u - e)⁴, (u - e)⁶
N_SHAPE = 3


@dataclass(frozen=True)
class TdcEstimate:
    """Where the compression dips are centred, relative to the rig's cylinder 1 TDC.

    Attributes
    ----------
    correction_deg : float
        Add to the rig's ``tdc_offset_deg`` to get the TDC the dips show, deg.
    se_deg : float
        Standard error of ``correction_deg`` (jackknife over blocks of cycles), deg.
    cycles : int
        Working cycles with at least one window used.
    windows : int
        TDC windows fitted (cycles x cylinders, whole windows only).
    rpm_range : tuple of float
        Slowest and fastest revolution mean speed used, rpm.
    at_search_edge : bool
        The best ``e`` lies at the edge of the search range (the estimate is not trustworthy).
    partner_exchange : bool
        Another cylinder passes its gas-exchange TDC inside the fit window of a firing TDC: its
        one-sided pumping leans the dip (about -1 deg on simulated rides), not corrected.
    """

    correction_deg: float
    se_deg: float
    cycles: int
    windows: int
    rpm_range: tuple[float, float]
    at_search_edge: bool
    partner_exchange: bool = False


def _energy_swing(angles: CrankAngles, mask: np.ndarray, wheel: ToothWheel, engine: Engine):
    """(θ mid-angle deg, q relative energy swing, revolution mean rpm) of the usable periods."""
    learner = ToothErrorLearner(wheel, engine, harmonics=16, inertia="none")
    learner.push(angles, mask)
    if learner.n_revs < 4:
        return None
    beta = np.linalg.lstsq(learner.XtX, learner.Xty, rcond=1e-10)[0]
    z = beta[:learner.L]  # log tooth spacing + inertia swing, per tooth
    ok = mask & angles.valid & np.isfinite(angles.period) & (angles.tooth >= 0)
    tooth = angles.tooth[ok]
    per = angles.period[ok]
    s0 = learner.s0[tooth]
    theta = angles.angle[ok] - 0.5 * s0
    r = np.log(per) - np.log(s0) - z[tooth]
    # one-revolution running means: the slow level of r and the mean speed (smooth, so that no
    # step appears inside a TDC window where one revolution hands over to the next)
    L = learner.L
    level = uniform_filter1d(r, L, mode="nearest")
    w = uniform_filter1d(s0 / per, 2 * L, mode="nearest")  # deg/s
    q = -2.0 * (r - level) * (w / np.median(w)) ** 2
    return theta, q, w / 6.0


def _window_stats(u, q, win, n_win, e, centre, W):
    """Per-window cross-products of the even shape columns at ``e`` and of q.

    The data are the samples within ``W`` of ``centre`` (fixed while ``e`` is searched, so the
    residuals of every ``e`` are comparable); each window's level and slope are projected out.
    """
    inside = np.abs(u - centre) <= W
    u, q, win = u[inside], q[inside], win[inside]
    v = (u - e) / W

    def wsum(x):
        return np.bincount(win, weights=x, minlength=n_win)

    sw = wsum(np.ones_like(u))
    sw[sw == 0] = np.inf
    uc = u - (wsum(u) / sw)[win]
    suu = wsum(uc * uc)
    suu[suu == 0] = np.inf
    cen = []
    for x in (*(v ** (2 * p) for p in range(1, N_SHAPE + 1)), q):
        xc = x - (wsum(x) / sw)[win]
        cen.append((xc, wsum(xc * uc) / suu))
    k = len(cen)
    S = np.empty((k, k, n_win))
    for i in range(k):
        for j in range(i, k):
            S[i, j] = S[j, i] = wsum(cen[i][0] * cen[j][0]) - cen[i][1] * cen[j][1] * suu
    return S  # [v², v⁴, v⁶, q] cross-products per window


def partner_exchange_deg(engine: Engine, reach_deg: float) -> float:
    """Nearest gas-exchange TDC of another cylinder to any cylinder's firing TDC, deg (NaN when
    none lies within ``reach_deg``; 2-strokes have none)."""
    if engine.stroke_cycle != 4 or engine.n_cylinders < 2:
        return float("nan")
    fire = np.asarray(firing_angles(engine), dtype=float)
    d = np.mod(fire[None, :] + 360.0 - fire[:, None] + 360.0, 720.0) - 360.0
    np.fill_diagonal(d, np.inf)
    near = np.abs(d)[np.abs(d) < reach_deg]
    return float(near.min()) if near.size else float("nan")


def _rss(S):
    """Residual sum of squares of q on the shape columns from summed cross-products."""
    A, b, c = S[:-1, :-1], S[:-1, -1], S[-1, -1]
    try:
        beta = np.linalg.solve(A, b)
    except np.linalg.LinAlgError:
        return np.inf, np.zeros(len(b))
    return float(c - b @ beta), beta


def _best(es, rss):
    """Minimum of rss over the grid es, refined by a parabola through its neighbours."""
    i = int(np.argmin(rss))
    if 0 < i < len(es) - 1:
        y0, y1, y2 = rss[i - 1], rss[i], rss[i + 1]
        den = y0 - 2 * y1 + y2
        if den > 0:
            return float(es[i] + 0.5 * (y0 - y2) / den * (es[1] - es[0])), i
    return float(es[i]), i


def tdc_from_motoring(angles: CrankAngles, no_firing, wheel: ToothWheel, engine: Engine, *,
                      window_deg: float = 40.0, search_deg: float = 20.0,
                      step_deg: float = 0.05, blocks: int = 20,
                      min_cycles: int = 20,
                      cylinders: Sequence[int] | None = None) -> TdcEstimate | None:
    """Estimate cylinder 1's TDC from the compression dips of a stretch without firing.

    Parameters
    ----------
    angles : CrankAngles
        Crank angles numbered with the rig's wheel (``tdc_offset_deg`` under test), phase known.
    no_firing : (n,) bool array_like
        Edges during which no cylinder fires (closed throttle on overrun fuel cut).
    wheel : ToothWheel
        The wheel the angles were numbered with.
    engine : Engine
        The layout: each cylinder's firing TDC gets a window.
    window_deg : float, keyword-only
        Half-width of the fit window around each firing TDC, crank deg.
    search_deg : float, keyword-only
        The symmetry point is sought within ``±search_deg`` of the rig's TDC.
    step_deg : float, keyword-only
        Grid step of the search, deg (refined by a parabola).
    blocks : int, keyword-only
        Blocks of consecutive cycles for the jackknife standard error.
    min_cycles : int, keyword-only
        Fewer cycles with windows than this: no estimate (None).
    cylinders : sequence of int, keyword-only
        Fit only these cylinders' windows (0-based, in cylinder order); default all. One
        cylinder at a time tells whether every dip sits where the layout puts it.

    Returns
    -------
    TdcEstimate or None
        None when the stretch is too short for an estimate.
    """
    mask = np.asarray(no_firing, bool)
    if mask.shape != angles.t.shape:
        raise InputError(f"no_firing must have shape {angles.t.shape}, got {mask.shape}")
    if not (window_deg > 0 and search_deg > 0 and step_deg > 0):
        raise InputError("window_deg, search_deg and step_deg must be > 0")
    swing = _energy_swing(angles, mask, wheel, engine)
    if swing is None:
        return None
    theta, q, rpm = swing
    W, cycle = float(window_deg), engine.cycle_deg
    uu, qq, wid, rr = [], [], [], []
    fire = np.asarray(firing_angles(engine), dtype=float)
    for k in range(len(fire)) if cylinders is None else cylinders:
        phi = fire[k]
        shifted = theta - phi + cycle / 2
        u = np.mod(shifted, cycle) - cycle / 2
        cyc = np.floor(shifted / cycle).astype(np.int64)
        sel = np.abs(u) <= W + search_deg
        uu.append(u[sel])
        qq.append(q[sel])
        wid.append(cyc[sel] * 64 + k)
        rr.append(rpm[sel])
    u, q, wid, rpm = (np.concatenate(a) for a in (uu, qq, wid, rr))
    ids, win = np.unique(wid, return_inverse=True)
    need = 0.8 * 2 * (W + search_deg) / wheel.pitch_deg  # whole windows only
    counts = np.bincount(win)
    whole = counts >= need
    keep = whole[win]
    if not keep.any():
        return None
    ids, win = np.unique(wid[keep], return_inverse=True)
    u, q, rpm = u[keep], q[keep], rpm[keep]
    cyc_of_win = ids // 64
    cycles = np.unique(cyc_of_win)
    if len(cycles) < min_cycles:
        return None
    n_win = len(ids)
    block_of_win = np.searchsorted(cycles, cyc_of_win) * min(blocks, len(cycles)) // len(cycles)
    n_blk = int(block_of_win.max()) + 1

    k = N_SHAPE + 1

    def stats_at(e, centre):
        S = np.nan_to_num(_window_stats(u, q, win, n_win, e, centre, W))
        return np.stack([np.bincount(block_of_win, weights=S[i, j], minlength=n_blk)
                         for i in range(k) for j in range(k)]).reshape(k, k, n_blk)

    # pass 1: data around the rig's TDC; then re-centre the data on the estimate and refine
    coarse = np.arange(-search_deg, search_deg + 1e-9, 0.25)
    rss_c = np.array([_rss(stats_at(e, 0.0).sum(axis=2))[0] for e in coarse])
    centre, i0 = _best(coarse, rss_c)
    at_edge = i0 in (0, len(coarse) - 1)
    for _ in range(3):
        fine = np.arange(centre - 2.0, centre + 2.0 + 1e-9, step_deg)
        blk = [stats_at(e, centre) for e in fine]
        total = np.array([_rss(b.sum(axis=2))[0] for b in blk])
        e_hat, _ = _best(fine, total)
        moved = abs(e_hat - centre) > 0.5
        centre = e_hat
        if not moved:
            break
    jack = []
    for g in range(n_blk):
        rss_g = np.array([_rss(b.sum(axis=2) - b[:, :, g])[0] for b in blk])
        jack.append(_best(fine, rss_g)[0])
    jack = np.asarray(jack)
    se = float(np.sqrt((n_blk - 1) / n_blk * np.sum((jack - jack.mean()) ** 2)))
    partner = bool(np.isfinite(partner_exchange_deg(engine, W)))
    return TdcEstimate(correction_deg=e_hat, se_deg=se, cycles=len(cycles), windows=n_win,
                       rpm_range=(float(rpm.min()), float(rpm.max())), at_search_edge=at_edge,
                       partner_exchange=partner)
