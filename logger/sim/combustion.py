"""Cylinder pressure of a spark-ignition 4-stroke, one firing event at a time (vectorised).

The model is the usual zero-dimensional one of the engine-modelling handbooks (e.g. Heywood,
*Internal Combustion Engine Fundamentals*, ch. 9 and 14, from memory):

* intake at manifold pressure until intake valve closing (IVC);
* polytropic compression ``p V^n = const`` from IVC (n ≈ 1.32);
* heat release following the Wiebe function ``x = 1 - exp(-a ((θ-θ0)/Δθ)^(m+1))``; the pressure
  is the motored polytrope blended towards the fired polytrope by the burned fraction: the fired
  polytrope starts from the motored pressure at the 50 % burn angle plus the constant-volume rise
  ``(γ - 1) Q / V`` of the heat released there, and expands with n ≈ 1.30;
* blowdown from exhaust valve opening (EVO) towards exhaust pressure, then the exhaust stroke.

Angles ``phi`` are local to the event: degrees from the cylinder's firing TDC, in [-360, 360).
Pressures are absolute, Pa. Everything broadcasts over events (leading axes) and angles.
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import piston_position

IVC_DEG = -135.0  # intake valve closes 45° after BDC
EVO_DEG = 130.0  # exhaust valve opens 50° before BDC
BLOWDOWN_DEG = 28.0  # e-folding angle of the blowdown
P_EXHAUST = 1.08e5  # Pa
P_CRANKCASE = 1.0e5  # Pa, under the piston
GAMMA = 1.30  # ratio of specific heats of the burning charge
R_AIR = 287.0  # J/(kg K)
T_IVC = 330.0  # K, charge temperature at IVC
LHV = 44.0e6  # J/kg, lower heating value of petrol
HEAT_TO_GAS = 0.80  # share of the fuel energy that raises pressure (wall loss, dissociation)
MOTORED_EXTRA_N = 0.04  # motored expansion exponent above compression's: heat lost at TDC


def wiebe_fraction(theta_deg, *, start_deg, duration_deg, a: float = 5.0, m: float = 2.0):
    """Wiebe mass fraction burned.

    x = 1 - exp(-a ((θ - θ0) / Δθ)^(m+1)) for θ >= θ0, 0 before.

    Parameters
    ----------
    theta_deg : array_like
        Crank angle, degrees.
    start_deg, duration_deg : array_like, broadcast against ``theta_deg``
        Start of combustion θ0 and burn duration Δθ, degrees.
    a, m : float, keyword-only
        Efficiency and form factors (a = 5 gives 99.3 % burned at θ0 + Δθ).
    """
    z = np.clip((np.asarray(theta_deg, dtype=float) - start_deg) / duration_deg, 0.0, None)
    return 1.0 - np.exp(-a * z ** (m + 1.0))


def wiebe_50_offset(*, a: float = 5.0, m: float = 2.0) -> float:
    """(θ50 - θ0) / Δθ: where half the charge has burned, as a share of the burn duration."""
    return float((np.log(2.0) / a) ** (1.0 / (m + 1.0)))


def cylinder_volume(phi_deg, engine: Engine, compression_ratio: float):
    """Cylinder volume, m³, at local angle ``phi_deg`` from the cylinder's TDC."""
    area = np.pi * engine.bore_m**2 / 4.0
    v_clear = area * engine.stroke_m / (compression_ratio - 1.0)
    return v_clear + area * piston_position(phi_deg, r=engine.crank_radius_m, l=engine.conrod_m)


def polytropic_pressure(volume, *, p_ref, v_ref, n: float):
    """p = p_ref (V_ref / V)^n: the polytropic relation p V^n = const."""
    return p_ref * (v_ref / np.asarray(volume, dtype=float)) ** n


def charge_heat(p_ivc, engine: Engine, compression_ratio: float, afr) -> np.ndarray:
    """Heat released into the gas by a full burn of the trapped charge, J (ideal gas at IVC)."""
    v_ivc = cylinder_volume(IVC_DEG, engine, compression_ratio)
    m_air = np.asarray(p_ivc, dtype=float) * v_ivc / (R_AIR * T_IVC)
    return HEAT_TO_GAS * LHV * m_air / np.asarray(afr, dtype=float)


def pressure(
    phi_deg,
    *,
    engine: Engine,
    compression_ratio: float,
    p_manifold,
    p_ivc,
    heat_j,
    start_deg,
    duration_deg,
    n_compression: float = 1.32,
    n_expansion: float = 1.30,
    a: float = 5.0,
    m: float = 2.0,
):
    """Absolute cylinder pressure over one 4-stroke cycle, Pa.

    Parameters
    ----------
    phi_deg : array_like, shape (..., k)
        Local angle from the firing TDC, degrees, within [-360, 360).
    engine : Engine
        Bore, stroke and con-rod give the volume.
    compression_ratio : float
    p_manifold, p_ivc : array_like, shape (..., 1) or broadcastable
        Intake pressure during the intake stroke and the trapped pressure at IVC, Pa.
    heat_j : array_like
        Heat released to the gas by this event, J (0 for a misfire or a fuel cut).
    start_deg, duration_deg : array_like
        Wiebe start of combustion and burn duration, degrees.
    n_compression, n_expansion, a, m : float, keyword-only
        Polytropic exponents and Wiebe factors.

    Returns
    -------
    ndarray, shape of the broadcast inputs
    """
    phi = np.asarray(phi_deg, dtype=float)
    vol = cylinder_volume(phi, engine, compression_ratio)
    v_ivc = cylinder_volume(IVC_DEG, engine, compression_ratio)
    v_tdc = cylinder_volume(0.0, engine, compression_ratio)
    p_ivc = np.asarray(p_ivc, dtype=float)
    p_tdc = p_ivc * (v_ivc / v_tdc) ** n_compression
    n_me = n_compression + MOTORED_EXTRA_N
    motored = np.where(
        phi <= 0.0,
        polytropic_pressure(vol, p_ref=p_ivc, v_ref=v_ivc, n=n_compression),
        polytropic_pressure(vol, p_ref=p_tdc, v_ref=v_tdc, n=n_me),
    )
    start = np.asarray(start_deg, dtype=float)
    dur = np.asarray(duration_deg, dtype=float)
    phi50 = start + wiebe_50_offset(a=a, m=m) * dur
    v50 = cylinder_volume(phi50, engine, compression_ratio)
    p50_mot = np.where(
        phi50 <= 0.0,
        polytropic_pressure(v50, p_ref=p_ivc, v_ref=v_ivc, n=n_compression),
        polytropic_pressure(v50, p_ref=p_tdc, v_ref=v_tdc, n=n_me),
    )
    p_star = p50_mot + (GAMMA - 1.0) * np.asarray(heat_j, dtype=float) / v50
    fired = polytropic_pressure(vol, p_ref=p_star, v_ref=v50, n=n_expansion)
    x = wiebe_fraction(phi, start_deg=start, duration_deg=dur, a=a, m=m)
    closed = motored + x * (fired - motored)

    # After EVO: blowdown from the closed-cycle pressure at EVO towards exhaust pressure.
    v_evo = cylinder_volume(EVO_DEG, engine, compression_ratio)
    x_evo = wiebe_fraction(EVO_DEG, start_deg=start, duration_deg=dur, a=a, m=m)
    p_mot_evo = polytropic_pressure(v_evo, p_ref=p_tdc, v_ref=v_tdc, n=n_me)
    p_fired_evo = polytropic_pressure(v_evo, p_ref=p_star, v_ref=v50, n=n_expansion)
    p_evo = p_mot_evo + x_evo * (p_fired_evo - p_mot_evo)
    decay = np.exp(-np.clip(phi - EVO_DEG, 0.0, None) / BLOWDOWN_DEG)
    blow = P_EXHAUST + (p_evo - P_EXHAUST) * decay

    # Intake stroke: exhaust pressure at the gas-exchange TDC eases to manifold pressure.
    p_man = np.asarray(p_manifold, dtype=float)
    ease = np.clip((phi + 360.0) / 40.0, 0.0, 1.0)
    intake = P_EXHAUST + (p_man - P_EXHAUST) * ease
    # Between intake and IVC the trapped pressure is reached smoothly (valve closing ramp).
    ramp = np.clip((phi - (IVC_DEG - 40.0)) / 40.0, 0.0, 1.0)
    intake = intake + (p_ivc - intake) * ramp
    return np.where(phi < IVC_DEG, intake, np.where(phi < EVO_DEG, closed, blow))


class PressureKernel:
    """:func:`pressure` at a fixed set of local angles, with the angle-only parts precomputed.

    The volume terms of the polytropes depend on the angle alone, so they are computed once;
    per event only the Wiebe fraction and a few products remain. Gives the same numbers as
    :func:`pressure` (to rounding) at a fraction of the cost.
    """

    def __init__(self, phi_deg, *, engine: Engine, compression_ratio: float,
                 n_compression: float = 1.32, n_expansion: float = 1.30,
                 a: float = 5.0, m: float = 2.0) -> None:
        self.phi = np.asarray(phi_deg, dtype=float)
        self.engine, self.cr = engine, compression_ratio
        self.nc, self.ne, self.a, self.m = n_compression, n_expansion, a, m
        vol = cylinder_volume(self.phi, engine, compression_ratio)
        self.v_ivc = float(cylinder_volume(IVC_DEG, engine, compression_ratio))
        self.v_tdc = float(cylinder_volume(0.0, engine, compression_ratio))
        v_evo = float(cylinder_volume(EVO_DEG, engine, compression_ratio))
        n_me = n_compression + MOTORED_EXTRA_N
        self.n_me = n_me
        # motored = p_ivc * shape_mot; fired = (p_star * v50^ne) * vol^-ne
        self.tdc_ratio = (self.v_ivc / self.v_tdc) ** n_compression
        self.shape_mot = np.where(self.phi <= 0.0, (self.v_ivc / vol) ** n_compression,
                                  self.tdc_ratio * (self.v_tdc / vol) ** n_me)
        self.vol_ne = vol ** (-n_expansion)
        self.evo_mot = self.tdc_ratio * (self.v_tdc / v_evo) ** n_me
        self.evo_ne = v_evo ** (-n_expansion)
        self.blow = np.exp(-np.clip(self.phi - EVO_DEG, 0.0, None) / BLOWDOWN_DEG)
        self.ease = np.clip((self.phi + 360.0) / 40.0, 0.0, 1.0)
        self.ramp = np.clip((self.phi - (IVC_DEG - 40.0)) / 40.0, 0.0, 1.0)
        self.x50 = wiebe_50_offset(a=a, m=m)

    def event_constants(self, *, p_ivc, heat_j, start_deg, duration_deg):
        """Per-event constants (fired polytrope constant, pressure at EVO), any shape."""
        phi50 = start_deg + self.x50 * duration_deg
        v50 = cylinder_volume(phi50, self.engine, self.cr)
        shape50 = np.where(phi50 <= 0.0, (self.v_ivc / v50) ** self.nc,
                           self.tdc_ratio * (self.v_tdc / v50) ** self.n_me)
        k_fired = (p_ivc * shape50 + (GAMMA - 1.0) * heat_j / v50) * v50**self.ne
        z_evo = np.clip((EVO_DEG - start_deg) / duration_deg, 0.0, None)
        x_evo = 1.0 - np.exp(-self.a * z_evo ** (self.m + 1.0))
        p_mot_evo = p_ivc * self.evo_mot
        p_evo = p_mot_evo + x_evo * (k_fired * self.evo_ne - p_mot_evo)
        return k_fired, p_evo

    def __call__(self, *, p_manifold, p_ivc, start_deg, duration_deg, k_fired, p_evo,
                 cols=slice(None)) -> np.ndarray:
        """Pressure, Pa, at the kernel's angles ``[cols]``; parameters broadcast against them.

        ``k_fired`` and ``p_evo`` come from :meth:`event_constants`.
        """
        phi = self.phi[cols]
        idx = np.arange(len(self.phi))[cols]
        # Local angles rise along the columns, so the three regions are contiguous slices.
        i1, i2 = np.searchsorted(phi, [IVC_DEG, EVO_DEG], side="left")
        shape = np.broadcast_shapes(np.shape(p_ivc), np.shape(start_deg), (len(phi),))
        out = np.empty(shape)
        if i1 > 0:
            c = idx[:i1]
            intake = P_EXHAUST + (p_manifold - P_EXHAUST) * self.ease[c]
            out[..., :i1] = intake + (p_ivc - intake) * self.ramp[c]
        if i2 > i1:
            c = idx[i1:i2]
            z = np.clip((self.phi[c] - start_deg) / duration_deg, 0.0, None)
            zp = z * z * z if self.m == 2.0 else z ** (self.m + 1.0)
            x = 1.0 - np.exp(-self.a * zp)
            motored = p_ivc * self.shape_mot[c]
            out[..., i1:i2] = motored + x * (k_fired * self.vol_ne[c] - motored)
        if len(phi) > i2:
            c = idx[i2:]
            out[..., i2:] = P_EXHAUST + (p_evo - P_EXHAUST) * self.blow[c]
        return out
