"""The 720° phase of a 4-stroke from its firing pattern (no cam needed where the layout allows).

Each cylinder slows the crank while it compresses its charge, so crank speed has a dip near every
*firing* TDC, with or without combustion; at the overlap TDC, one revolution later, nothing is
compressed. Everything that repeats every revolution (reciprocating inertia, tooth errors) is
the same in both revolutions, so only the part of the speed signal that changes sign from one
revolution to the next can tell them apart. We correlate that part with a template of dips at
the layout's firing angles minus the same template shifted by 360°; the template vanishes for
layouts whose firing angles map onto themselves under a 360° shift (a 360° twin, a flat-plane
four), which is exactly when the phase cannot be known.
"""

from __future__ import annotations

import numpy as np
from scipy.special import stdtr

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import firing_angles
from crankbeat.errors import InputError

#: width of one compression dip in the template, deg (a guess at its shape: only the sign and
#: rough location of the dip matter for the correlation)
_DIP_SIGMA_DEG = 45.0


def _wrap(x: np.ndarray, period: float) -> np.ndarray:
    return np.mod(x + period / 2, period) - period / 2


def pattern_template(theta_deg: np.ndarray, engine: Engine) -> np.ndarray:
    """Dips at the firing TDCs minus dips at the overlap TDCs, at cycle angles ``theta_deg``."""
    fire = firing_angles(engine)
    x = np.asarray(theta_deg, dtype=float)[..., None] - fire
    dip = -np.exp(-0.5 * (_wrap(x, 720.0) / _DIP_SIGMA_DEG) ** 2)
    dip_other = -np.exp(-0.5 * (_wrap(x - 360.0, 720.0) / _DIP_SIGMA_DEG) ** 2)
    return np.sum(dip - dip_other, axis=-1)


def phase_distinguishable(engine: Engine) -> bool:
    """Whether the firing pattern alone can tell the two revolutions of the cycle apart."""
    if engine.stroke_cycle != 4:
        return False
    grid = np.arange(0.0, 720.0, 1.0)
    return bool(np.max(np.abs(pattern_template(grid, engine))) > 0.05)


def phase_from_pattern(
    angles: np.ndarray, periods: np.ndarray, engine: Engine
) -> tuple[float, float]:
    """720° phase of a 4-stroke from the crank-speed pattern of a few cycles.

    Parameters
    ----------
    angles : (n,) array_like
        Unwrapped crank angle of consecutive tooth edges, deg, numbered as if the phase were 0
        (cylinder 1 firing TDC at multiples of 720). NaN edges are skipped.
    periods : (n,) array_like
        Period ending at each edge, s.
    engine : Engine
        The layout; its firing angles come from :func:`dsp.layout.firing_angles`.

    Returns
    -------
    offset_deg : float
        0.0 when the numbering is right, 360.0 when cylinder 1 fires one revolution later
        (add it to ``angles``).
    confidence : float
        0..1: one minus the two-sided p-value of the per-cycle scores (Student t over cycles);
        0.0 when the layout cannot tell the revolutions apart or fewer than two whole cycles
        of speed data are available.

    Notes
    -----
    The slow speed trend is removed by a moving average over exactly one cycle (720°), which
    leaves every order of the cycle untouched; half a cycle at each end is dropped for it.
    """
    a = np.asarray(angles, dtype=float)
    p = np.asarray(periods, dtype=float)
    if a.shape != p.shape or a.ndim != 1:
        raise InputError(
            f"angles and periods must be 1-d of equal length, got shapes {a.shape}, {p.shape}")
    if engine.stroke_cycle != 4 or not phase_distinguishable(engine):
        return 0.0, 0.0
    da = np.diff(a)
    pp = p[1:]
    ok = np.isfinite(da) & np.isfinite(pp) & (da > 0) & (pp > 0)
    if ok.sum() < 8:
        return 0.0, 0.0
    mid = (a[1:] - da / 2)[ok]
    dth = da[ok]
    y = np.log(dth / pp[ok])
    # one-cycle moving average of y over angle, from the running integral
    cum = np.concatenate(([0.0], np.cumsum(y * dth)))
    edge_ang = np.concatenate(([mid[0] - dth[0] / 2], mid + dth / 2))
    inside = (mid - 360.0 >= edge_ang[0]) & (mid + 360.0 <= edge_ang[-1])
    if not inside.any():
        return 0.0, 0.0
    hi = np.interp(mid[inside] + 360.0, edge_ang, cum)
    lo = np.interp(mid[inside] - 360.0, edge_ang, cum)
    fluct = y[inside] - (hi - lo) / 720.0
    th = mid[inside]
    w = dth[inside] * pattern_template(np.mod(th, 720.0), engine)
    cycle = np.floor((th - th[0]) / 720.0).astype(int)
    scores = np.bincount(cycle, weights=fluct * w)
    whole = np.bincount(cycle, weights=dth[inside]) > 700.0
    scores = scores[whole]
    if len(scores) < 2:
        return 0.0, 0.0
    mean = float(np.mean(scores))
    sd = float(np.std(scores, ddof=1))
    offset = 0.0 if mean > 0 else 360.0
    if sd == 0.0:
        return offset, 1.0 if mean != 0 else 0.0
    tstat = abs(mean) / (sd / np.sqrt(len(scores)))
    conf = 1.0 - 2.0 * float(stdtr(len(scores) - 1, -tstat))
    return offset, conf

