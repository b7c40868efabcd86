"""The trigger wheel of the simulated bike: where its edges are and when they pass.

Tooth edge angles are unwrapped crank degrees with 0 at cylinder 1's firing TDC of cycle 0 (the
:mod:`dsp.engine` convention). Tooth 0 is the first after the gap; its falling edge lies
``wheel.tdc_offset_deg`` before cylinder 1's TDC.
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.crank import ToothWheel


def wheel_errors(wheel: ToothWheel, rms_deg: float, rng: np.random.Generator) -> np.ndarray:
    """Spacing error of each physical tooth's edge, degrees, zero mean, shape (real_teeth,)."""
    err = rng.standard_normal(wheel.real_teeth) * rms_deg
    return err - err.mean() if rms_deg > 0 else np.zeros(wheel.real_teeth)


def edges_between(lo_deg: float, hi_deg: float, wheel: ToothWheel, errors: np.ndarray):
    """Physical tooth edges with unwrapped angle in [lo, hi).

    Returns
    -------
    angle_deg : (n,) float64
    tooth : (n,) int64, 0 = first tooth after the gap
    rev : (n,) int64, wheel revolution index (revolution 0 starts at tooth 0 before cycle 0's TDC)
    """
    base = -wheel.tdc_offset_deg
    r0 = int(np.floor((lo_deg - base) / 360.0)) - 1
    r1 = int(np.floor((hi_deg - base) / 360.0)) + 1
    revs = np.arange(r0, r1 + 1)
    teeth = np.arange(wheel.real_teeth)
    ang = base + 360.0 * revs[:, None] + wheel.pitch_deg * teeth[None, :] + errors[None, :]
    tooth = np.broadcast_to(teeth, ang.shape)
    rev = np.broadcast_to(revs[:, None], ang.shape)
    keep = (ang >= lo_deg) & (ang < hi_deg)
    return ang[keep], tooth[keep].astype(np.int64), rev[keep].astype(np.int64)


def cam_levels(rev: np.ndarray, wheel: ToothWheel) -> np.ndarray:
    """Cam level at teeth of wheel revolutions ``rev`` (int8; -1 when the wheel has no cam).

    ``window``: the active level during the revolution (from tooth 0) holding cylinder 1's firing
    TDC, the other level during the next one.
    """
    if wheel.cam == "none":
        return np.full(rev.shape, -1, dtype=np.int8)
    start = -wheel.tdc_offset_deg + 360.0 * rev
    holds_tdc = np.mod(-start, 720.0) < 360.0
    active = wheel.cam_active_level
    return np.where(holds_tdc, active, 1 - active).astype(np.int8)


def hermite(xq: np.ndarray, x: np.ndarray, y: np.ndarray, dydx: np.ndarray) -> np.ndarray:
    """Cubic Hermite interpolation through (x, y) with slopes dydx; x increasing."""
    i = np.clip(np.searchsorted(x, xq, side="right") - 1, 0, len(x) - 2)
    h = x[i + 1] - x[i]
    u = (xq - x[i]) / h
    u2, u3 = u * u, u * u * u
    return ((2 * u3 - 3 * u2 + 1) * y[i] + (u3 - 2 * u2 + u) * h * dydx[i]
            + (-2 * u3 + 3 * u2) * y[i + 1] + (u3 - u2) * h * dydx[i + 1])
