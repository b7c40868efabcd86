"""A geared inertia on the crank: clutch basket, primary drive and gearbox input shaft.

On a real bike the crank does not turn alone. The primary drive turns the clutch basket and,
with the clutch closed, the gearbox input shaft; in neutral the basket and the input shaft still
turn. Their inertia J_s (at their own shaft, which turns ``1 / ratio`` times as fast as the crank)
is felt at the crank as J_g = J_s / ratio², joined through the compliance of the primary drive
(gear teeth, the basket's cush springs), k_g referred to the crank. The rig file knows none of it:
it gives the crank and flywheel alone.

Model: the engine-alone crank motion of :mod:`logger.sim.crank` has the within-cycle angle
fluctuation a(t) about its smooth mean path. With the geared part the crank turns θ = θ_alone + δ,

    J_e δ'' = −(k_g + c_g d/dt)(a + δ − w),   J_g w'' = (k_g + c_g d/dt)(a + δ − w)

so that δ = H(s) a with

    H(s) = −(k_g + c_g s) J_g / (J_e J_g s² + c_g (J_e + J_g) s + k_g (J_e + J_g)).

The two-inertia mode lies at f_g = sqrt(k_g (J_e + J_g) / (J_e J_g)) / 2π (handbook two-mass
torsional system, e.g. Den Hartog, *Mechanical Vibrations*, from memory). Far below it H → −J_g /
(J_e + J_g): the crank's fluctuation shrinks as if the inertias were one (speed fluctuation
ΔE / (J ω²)); far above it H → 0. Only time is corrected (as in :mod:`logger.sim.driveline`): an
edge at angle θ passes at t_alone(θ) − δ / ω. The driveline mode is then solved with J_e + J_g
as the engine side (the two modes lie an order of magnitude apart, so taking them one after the
other is a fair approximation of the three-mass chain).
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import bilinear, lfilter, lfilter_zi

from crankbeat.logger.sim.scenario import Physics
from crankbeat.logger.sim.teeth import hermite

FS = 20000.0  # Hz, grid of the geared solution (firing harmonics and a mode up to ~500 Hz)


def geared_ratio(phys: Physics) -> float:
    """Crank turns per turn of the geared shaft (``geared_ratio``, else the primary ratio)."""
    return float(phys.geared_ratio) if phys.geared_ratio > 0 else float(phys.primary_ratio)


def referred_inertia(phys: Physics) -> float:
    """The geared part's inertia felt at the crank, J_s / ratio², kg·m²."""
    return float(phys.geared_inertia_kgm2) / geared_ratio(phys) ** 2


def referred_stiffness(phys: Physics, j_engine: float) -> float:
    """k_g referred to the crank, N·m/rad, that puts the two-inertia mode at ``geared_hz``."""
    j_g = referred_inertia(phys)
    w = 2.0 * np.pi * phys.geared_hz
    return float(w * w * j_engine * j_g / (j_engine + j_g))


def mode_frequency(phys: Physics, j_engine: float) -> float:
    """Two-inertia mode of crank and geared part, Hz (the handbook formula)."""
    j_g = referred_inertia(phys)
    k = referred_stiffness(phys, j_engine)
    return float(np.sqrt(k * (j_engine + j_g) / (j_engine * j_g)) / (2.0 * np.pi))


def transfer(phys: Physics, j_engine: float):
    """Continuous (num, den) of H(s) above."""
    j_g = referred_inertia(phys)
    k = referred_stiffness(phys, j_engine)
    j_red = j_engine * j_g / (j_engine + j_g)
    c = 2.0 * phys.geared_damping * np.sqrt(k / j_red) * j_red
    num = [-c * j_g, -k * j_g]
    den = [j_engine * j_g, c * (j_engine + j_g), k * (j_engine + j_g)]
    return num, den


def apply(phys: Physics, j_engine: float, *, theta_rad: np.ndarray, t_alone: np.ndarray,
          omega_alone: np.ndarray, cycle_t: np.ndarray):
    """Add the geared part to the engine-alone edges.

    Parameters
    ----------
    phys : Physics
        ``geared_inertia_kgm2`` > 0 (else the edges come back unchanged).
    j_engine : float
        Mean crank inertia of the engine-alone solution, kg·m².
    theta_rad, t_alone, omega_alone : (n,) float64
        Edge angles (unwrapped, rad), their engine-alone times (s) and speeds (rad/s).
    cycle_t : (c + 1,) float64
        Engine-alone time of each working cycle's start, s.

    Returns
    -------
    t, omega : (n,) float64
        Corrected edge times and crank speeds.
    """
    if phys.geared_inertia_kgm2 <= 0.0:
        return t_alone, omega_alone
    n = int(np.floor(t_alone[-1] * FS)) + 1
    grid_t = np.arange(n) / FS
    theta_u = hermite(grid_t, t_alone, theta_rad, omega_alone)
    path = CubicSpline(cycle_t, 4.0 * np.pi * np.arange(len(cycle_t)))(grid_t)
    fluct = theta_u - path
    b, a = bilinear(*transfer(phys, j_engine), fs=FS)
    # Start in the steady state of the first value (no start-up ringing of the mode).
    delta = lfilter(b, a, fluct, zi=lfilter_zi(b, a) * fluct[0])[0]
    t = t_alone.copy()
    for _ in range(3):
        t = t_alone - np.interp(t, grid_t, delta) / omega_alone
    rate = np.gradient(delta, 1.0 / FS)
    omega = omega_alone + np.interp(t, grid_t, rate)
    return t, omega
