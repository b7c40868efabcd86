"""The driveline's torsional mode and the road input, added to the engine-alone crank motion.

Model (one mode, referred to the crank): the engine inertia J_e is joined by a spring k and a
damper c (chain, cush drive, tyre; k = k_wheel / G²) to the vehicle inertia J_v = (M r² + J_w) / G²,
which the mean-speed controller holds with a velocity feedback b and which the road kicks with an
angular momentum disturbance Q(t). The mode lies at sqrt(k (1/J_e + 1/J_v)) / 2π, 8–30 Hz
depending on gear and stiffness.

The engine-alone solution of :mod:`logger.sim.crank` (variable inertia, exact gas torque) has the
within-cycle angle fluctuation a(t) = θ_alone(t) − Θ(t) about its smooth mean path Θ. With the
driveline the crank turns θ = θ_alone + δ, and δ follows the linear system

    J_e δ'' = −(k + c d/dt)(a + δ − w),   J_v w'' = (k + c d/dt)(a + δ − w) − b w' + Q'

so that δ = H_a(s) a + H_q(s) Q with

    P(s)  = J_e J_v s³ + (J_e b + c (J_e + J_v)) s² + (k (J_e + J_v) + c b) s + k b
    H_a(s) = −(k + c s)(J_v s + b) / P(s),   H_q(s) = (k + c s) / P(s),

solved per clutch-closed span with ``scipy.signal.lfilter`` (bilinear transform). Below the mode
H_a → −1 (the vehicle's inertia holds the crank), far above it H_a → 0 (the crank turns freely).
The gas torque stays locked to the crank angle because only time is corrected, to first order in δ:
an edge at angle θ passes at t_alone(θ) − δ / ω.
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import bilinear, butter, lfilter, sosfilt

from crankbeat.logger.sim.crank import CONTROL_TAU_S, SlowTrack, vehicle_inertia
from crankbeat.logger.sim.profile import overall_ratio
from crankbeat.logger.sim.scenario import Scenario
from crankbeat.logger.sim.teeth import hermite

FS = 4000.0  # Hz, grid of the driveline solution
TAPER_S = 0.25  # the mode dies out over this after the clutch opens
ROUGH_KICK = 0.005  # rms road momentum kick per unit roughness, share of J_v ω


def referred_stiffness(scenario: Scenario, j_engine: float, gear: int) -> float:
    """Driveline stiffness referred to the crank in ``gear``, N·m/rad.

    From ``driveline_stiffness`` (at the rear wheel, / overall ratio²), or, when ``driveline_hz``
    is set, the stiffness that puts the two-inertia mode there:
    k = (2π f)² J_e J_v / (J_e + J_v).
    """
    phys = scenario.physics
    if phys.driveline_hz > 0:
        j_v = vehicle_inertia(scenario, gear)
        w = 2.0 * np.pi * phys.driveline_hz
        return float(w * w * j_engine * j_v / (j_engine + j_v))
    g = float(overall_ratio(phys, gear))
    return phys.driveline_stiffness / g**2


def mode_frequency(scenario: Scenario, j_engine: float, gear: int) -> float:
    """Driveline mode frequency in ``gear``, Hz."""
    k = referred_stiffness(scenario, j_engine, gear)
    j_v = vehicle_inertia(scenario, gear)
    return float(np.sqrt(k * (1.0 / j_engine + 1.0 / j_v)) / (2.0 * np.pi))


def transfer(scenario: Scenario, j_engine: float, gear: int):
    """Continuous (num, den) of H_a and H_q in ``gear``."""
    phys = scenario.physics
    k = referred_stiffness(scenario, j_engine, gear)
    j_v = vehicle_inertia(scenario, gear)
    j_red = j_engine * j_v / (j_engine + j_v)
    wn = np.sqrt(k / j_red)
    c = 2.0 * phys.driveline_damping * wn * j_red
    b = (j_engine + j_v) / CONTROL_TAU_S
    je = j_engine
    den = [je * j_v, je * b + c * (je + j_v), k * (je + j_v) + c * b, k * b]
    num_a = [-c * j_v, -(k * j_v + c * b), -k * b]
    num_q = [c, k]
    return (num_a, den), (num_q, den)


def spans(track: SlowTrack) -> list[tuple[int, int, int]]:
    """(first cycle, end cycle, gear) of each run of clutch-closed cycles in one gear."""
    out = []
    key = np.where(track.engaged, track.gear, -1)
    change = np.flatnonzero(np.diff(key)) + 1
    bounds = np.concatenate(([0], change, [len(key)]))
    for a, b in zip(bounds[:-1], bounds[1:]):
        if key[a] > 0:
            out.append((int(a), int(b), int(key[a])))
    return out


def road_kicks(n: int, rng: np.random.Generator) -> np.ndarray:
    """Unit-rms band-limited (5–40 Hz) noise on the driveline grid: the shape of the road input."""
    sos = butter(2, [5.0, 40.0], btype="bandpass", fs=FS, output="sos")
    x = sosfilt(sos, rng.standard_normal(n + 2000))[2000:]
    return x / max(float(np.std(x)), 1e-12)


def apply(
    scenario: Scenario,
    track: SlowTrack,
    j_engine: float,
    *,
    theta_rad: np.ndarray,
    t_alone: np.ndarray,
    omega_alone: np.ndarray,
    cycle_t: np.ndarray,
    rng: np.random.Generator,
):
    """Add the driveline mode and the road input to the engine-alone edges.

    Returns (t, omega, grid_t, delta): corrected edge times and speeds, and δ on the grid.
    """
    n = int(np.floor(t_alone[-1] * FS)) + 1
    grid_t = np.arange(n) / FS
    kicks = road_kicks(n, rng)
    delta = np.zeros(n)
    sp = spans(track)
    if sp:
        theta_u = hermite(grid_t, t_alone, theta_rad, omega_alone)
        path = CubicSpline(cycle_t, 4.0 * np.pi * np.arange(len(cycle_t)))(grid_t)
        fluct = theta_u - path
        omega_u = np.interp(grid_t, cycle_t[:-1], track.omega)
        cyc = np.clip(np.searchsorted(cycle_t, grid_t, side="right") - 1, 0, len(track.rough) - 1)
        rough = track.rough[cyc]
        gain = ROUGH_KICK * scenario.physics.rough_gain
        for c0, c1, gear in sp:
            i0 = int(np.ceil(cycle_t[c0] * FS))
            i_end = min(int(np.floor(cycle_t[c1] * FS)), n)
            i1 = min(i_end + int(TAPER_S * FS), n)
            if i1 - i0 < 4:
                continue
            (na, da), (nq, dq) = transfer(scenario, j_engine, gear)
            ba, aa = bilinear(na, da, fs=FS)
            bq, aq = bilinear(nq, dq, fs=FS)
            q = gain * vehicle_inertia(scenario, gear) * omega_u[i0:i1] * rough[i0:i1]
            q = q * kicks[i0:i1]
            d = lfilter(ba, aa, fluct[i0:i1]) + lfilter(bq, aq, q)
            tail = np.arange(i1 - i0) - (i_end - i0)
            fade = 0.5 * (1.0 + np.cos(np.pi * np.clip(tail / (TAPER_S * FS), 0, 1)))
            taper = np.where(tail <= 0, 1.0, fade)
            delta[i0:i1] += d * taper
    t = t_alone.copy()
    for _ in range(2):
        t = t_alone - np.interp(t, grid_t, delta) / omega_alone
    rate = np.gradient(delta, 1.0 / FS)
    omega = omega_alone + np.interp(t, grid_t, rate)
    return t, omega, grid_t, delta
