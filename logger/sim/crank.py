"""Crank-angle dynamics of the simulated engine: the mean-speed loop and the exact fine solution.

Method (why it is fast and still exact where it matters)
-------------------------------------------------------
The crank is integrated in the *angle* domain with the energy equation of a variable-inertia
rotor, d(½ J(θ) ω²)/dθ = T_gas(θ) − T_friction − T_shaft, where J(θ) = J0 + Σ m (ds_k/dθ)²
carries the reciprocating inertia exactly (slider-crank). Given the torques, the kinetic energy is
a cumulative sum over the angle grid, ω = sqrt(2E/J(θ)), and time is the cumulative sum of dθ/ω:
no per-degree Python loop, arbitrary speed fluctuation (idle included) and no stiffness problem.

What needs a loop is the slow part: the rider-and-dyno controller that holds the mean crank
speed on the scenario's profile, the road load and the gear. That loop runs once per working
cycle (a few scalar operations), first with tabulated event works to fix the ground-truth
decisions, then again with the exact per-cycle gas work of the fine grid, so that the fine
solution ends every cycle exactly at the energy the loop planned. Friction and the shaft torque
are taken constant within a cycle (their variation within 720° is small beside the gas torque);
the driveline's torsional oscillation is added afterwards (:mod:`logger.sim.driveline`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.errors import InputError
from crankbeat.logger.sim import maps
from crankbeat.logger.sim.firing import GRID_STEP_DEG, N_GRID, GasTorque
from crankbeat.logger.sim.profile import Profile, overall_ratio
from crankbeat.logger.sim.scenario import Scenario

H_RAD = math.radians(GRID_STEP_DEG)
CONTROL_TAU_S = 0.3  # time constant of the mean-speed controller
RHO_AIR = 1.2
G = 9.81
WHEEL_INERTIA = 0.9  # kg·m², both wheels and the rear sprocket, at the wheel
BLOCK_CYCLES = 256


@dataclass
class CycleWorks:
    """Per-cycle summaries of the gas torque on the fine grid (cycle c: crank [720c, 720c+720))."""

    work: np.ndarray  # J over the window (trapezoid on the grid)
    mean_cum: np.ndarray  # mean over the window of the cumulative gas work from its start, J
    var_cum: np.ndarray  # variance of the detrended cumulative gas work, J²


@dataclass
class SlowTrack:
    """What the per-cycle loop decided, one entry per cycle."""

    t: np.ndarray  # s from the ride start at the cycle's start (estimate)
    omega: np.ndarray  # rad/s mean crank speed (estimate)
    energy: np.ndarray  # J kinetic energy at the cycle start (exact for the fine solution)
    friction: np.ndarray  # N·m
    shaft: np.ndarray  # N·m, load on the crank (controller + road + vehicle inertia)
    road_kmh: np.ndarray
    gear: np.ndarray
    engaged: np.ndarray
    throttle: np.ndarray  # % at the cycle start
    rough: np.ndarray
    nominal_work: np.ndarray  # J, the cycle's gas work without scatter or faults


def displacement(engine: Engine) -> float:
    return engine.n_cylinders * math.pi / 4.0 * engine.bore_m**2 * engine.stroke_m


def inertia_table(engine: Engine) -> np.ndarray:
    """J(θ) on one cycle of the grid plus its end point, kg·m², shape (N_GRID + 1,)."""
    theta = GRID_STEP_DEG * np.arange(N_GRID + 1)
    return np.asarray(equivalent_inertia(theta, engine))


def vehicle_inertia(scenario: Scenario, gear: int) -> float:
    """Vehicle and wheels referred to the crank in ``gear``, kg·m²."""
    p = scenario.physics
    g = float(overall_ratio(p, gear))
    return (p.vehicle_mass_kg * p.wheel_radius_m**2 + WHEEL_INERTIA) / g**2


def slow_loop(
    scenario: Scenario,
    engine: Engine,
    profile: Profile,
    n_cycles: int,
    *,
    works,
    decide=None,
    t_end: float | None = None,
) -> SlowTrack:
    """Run the mean-speed loop over ``n_cycles`` working cycles.

    ``works(c, rpm, throttle) -> (W, M, V, W_nominal)`` gives the cycle's gas-work summaries
    (W_nominal: the work without scatter or faults, which the controller's feed-forward knows);
    ``decide(c, t, omega, targets)`` (first pass only) is called before it to fix the cycle's
    events. With ``t_end`` the loop stops early once the ride time reaches it.
    """
    phys = scenario.physics
    vd = displacement(engine)
    j_mean = float(np.mean(inertia_table(engine)[:-1]))
    out = {k: np.empty(n_cycles) for k in ("t", "omega", "energy", "friction", "shaft", "v",
                                           "throttle", "rough")}
    gear_out = np.empty(n_cycles, dtype=np.int64)
    eng_out = np.empty(n_cycles, dtype=bool)
    tg0 = profile.at(0.0)
    omega = float(tg0.omega_ref)
    n_gears = len(phys.gear_ratios)
    ratio_of = [math.nan] + [float(overall_ratio(phys, g)) for g in range(1, n_gears + 1)]
    jv_of = [0.0] + [vehicle_inertia(scenario, g) for g in range(1, n_gears + 1)]
    fa, fb, fc = phys.fmep_bar
    fric_k = maps.BAR * vd / (4.0 * math.pi)
    roll = phys.vehicle_mass_kg * G * phys.rolling_coeff
    drag = 0.5 * RHO_AIR * phys.drag_area_m2
    energy = 0.5 * j_mean * omega**2
    t = 0.0
    integ = 0.0
    tf_prev = ts_prev = 0.0
    nominal_w = np.empty(n_cycles)
    v = omega * phys.wheel_radius_m / float(overall_ratio(phys, max(int(tg0.gear), 1)))
    prev_state: tuple[int, bool] | None = None
    four_pi = 4.0 * math.pi
    done = n_cycles
    for c in range(n_cycles):
        if t_end is not None and t >= t_end:
            done = c
            break
        tg = profile.at_scalar(t)
        if decide is not None:
            decide(c, t, omega, tg)
        w_c, m_c, v_c, w_nom = works(c, omega * 30.0 / math.pi, tg[2])
        if c == 0:
            # Start in balance at the target speed: the first cycle's load takes its gas work.
            krpm = omega * 30.0 / math.pi / 1000.0
            tf_prev = (fa + fb * krpm + fc * krpm * krpm) * fric_k
            ts_prev = w_c / four_pi - tf_prev
            shape = m_c - (tf_prev + ts_prev) * H_RAD * (N_GRID - 1) / 2.0
            energy = 0.5 * j_mean * omega**2 - shape
        half = H_RAD * (N_GRID - 1) / 2.0
        load = tf_prev + ts_prev
        w_start = profile.at_scalar(t)[0]
        for it in range(4):
            load_in = load
            # The cycle's mean speed depends on its own load, which depends on the mean speed:
            # a few fixed-point rounds settle it (the load is smooth, two or three suffice).
            e_mean = energy + m_c - load * half
            if e_mean <= 0.0:
                if it == 3 or energy + m_c <= 0.0:
                    raise InputError(
                        f"scenario {scenario.name!r}: the engine stalls at t={t:.2f} s "
                        "(throttle too low for the load or target speed)"
                    )
                # The previous cycle's load was too much for this one: start from less.
                e_mean = 0.05 * (energy + m_c)
            omega = math.sqrt(2.0 * e_mean / j_mean)
            dt = four_pi / omega * (1.0 + 0.375 * v_c / e_mean**2)
            w_ref, _, thr, gear, engaged, rough = profile.at_scalar(t + 0.5 * dt)
            # The target's mean slope over this cycle (a long idle cycle may outlast a ramp).
            w_end = profile.at_scalar(t + dt)[0]
            rate = (w_end - w_start) / dt
            krpm = omega * 30.0 / math.pi / 1000.0
            tf = (fa + fb * krpm + fc * krpm * krpm) * fric_k
            if engaged:
                ratio = ratio_of[gear]
                j_v = jv_of[gear]
                v_new = omega * phys.wheel_radius_m / ratio
                t_road = (roll + drag * v_new * v_new) * phys.wheel_radius_m / ratio
            else:
                j_v, t_road = 0.0, 0.0
                v_new = max(v - (roll + drag * v * v) / phys.vehicle_mass_kg * dt, 0.0)
            j_tot = j_mean + j_v
            kp = j_tot / CONTROL_TAU_S
            ki = j_tot / (2.0 * CONTROL_TAU_S**2)
            err = w_ref - omega
            integ_new = (0.0 if prev_state != (gear, engaged) else integ) + err * dt
            # The rider-and-dyno controller knows the nominal torque balance of the operating
            # point (feed-forward) but not this cycle's scatter or faults: only its PI part does.
            nominal = w_nom / four_pi - tf - t_road
            brake = nominal - j_tot * rate - kp * err - ki * integ_new
            t_load = t_road + brake
            alpha = (w_c / four_pi - tf - t_load) / j_tot
            ts = t_load + j_v * alpha
            # Rider and governor never brake the crank below 70 % of the target speed (a misfire
            # during a steep ramp would otherwise stall an engine no rider would let stall).
            floor = 0.5 * j_mean * (0.7 * w_end) ** 2
            if energy + w_c - four_pi * (tf + ts) < floor:
                ts = (energy + w_c - floor) / four_pi - tf
            load = tf + ts
            if abs(load - load_in) <= 1e-9 * (1.0 + abs(load)):
                break
        integ, v, prev_state = integ_new, v_new, (gear, engaged)
        out["t"][c], out["omega"][c], out["energy"][c] = t, omega, energy
        out["friction"][c], out["shaft"][c], out["v"][c] = tf, ts, v
        out["throttle"][c], out["rough"][c] = thr, rough
        nominal_w[c] = w_nom
        gear_out[c], eng_out[c] = gear, engaged
        energy += w_c - four_pi * (tf + ts)
        t += dt
        tf_prev, ts_prev = tf, ts
    if t_end is not None and done == n_cycles and t < t_end:
        raise InputError(f"scenario {scenario.name!r}: more cycles than planned ({n_cycles})")
    o = {k: v[:done] for k, v in out.items()}
    return SlowTrack(t=o["t"], omega=o["omega"], energy=o["energy"], friction=o["friction"],
                     shaft=o["shaft"], road_kmh=o["v"] * 3.6, gear=gear_out[:done],
                     engaged=eng_out[:done], throttle=o["throttle"], rough=o["rough"],
                     nominal_work=nominal_w[:done])


def cumulative(y: np.ndarray) -> np.ndarray:
    """Trapezoid cumulative integral along the last axis on the grid, starting at 0."""
    out = np.zeros_like(y)
    np.cumsum(0.5 * (y[..., 1:] + y[..., :-1]) * H_RAD, axis=-1, out=out[..., 1:])
    return out


def cycle_works(gas: GasTorque, n_cycles: int) -> CycleWorks:
    """Per-window gas-work summaries from the exact traces (for the second pass)."""
    w, m, v = (np.empty(n_cycles) for _ in range(3))
    ramp = np.arange(N_GRID) / N_GRID
    for c0 in range(0, n_cycles, BLOCK_CYCLES):
        c1 = min(c0 + BLOCK_CYCLES, n_cycles)
        g = cumulative(gas.block(c0, c1))
        w[c0:c1] = g[:, -1]
        m[c0:c1] = g[:, :-1].mean(axis=1)
        v[c0:c1] = (g[:, :-1] - g[:, -1:] * ramp).var(axis=1)
    return CycleWorks(work=w, mean_cum=m, var_cum=v)


@dataclass
class FineBlock:
    """The fine solution of a block of windows on the grid."""

    theta_deg: np.ndarray  # (n, N_GRID + 1) unwrapped crank angle
    t: np.ndarray  # s from the ride start
    omega: np.ndarray  # rad/s
    gas_torque: np.ndarray  # N·m


def fine_blocks(engine: Engine, scenario: Scenario, gas: GasTorque, track: SlowTrack):
    """Yield :class:`FineBlock` for consecutive blocks of windows (the exact time base)."""
    jtab = inertia_table(engine)
    n = len(track.energy)
    t_start = 0.0
    steps = np.arange(N_GRID + 1) * H_RAD
    for c0 in range(0, n, BLOCK_CYCLES):
        c1 = min(c0 + BLOCK_CYCLES, n)
        tq = gas.block(c0, c1)
        load = (track.friction[c0:c1] + track.shaft[c0:c1])[:, None]
        energy = track.energy[c0:c1, None] + cumulative(tq) - load * steps
        if np.any(energy <= 0.0):
            bad = c0 + int(np.argmax(np.any(energy <= 0.0, axis=1)))
            raise InputError(
                f"scenario {scenario.name!r}: the crank stops within cycle {bad} "
                f"(t~{track.t[bad]:.2f} s): too little torque for the load"
            )
        omega = np.sqrt(2.0 * energy / jtab)
        dt = cumulative(1.0 / omega)
        # Each window's time is its start plus the integral of dθ/ω; windows chain exactly.
        starts = t_start + np.concatenate(([0.0], np.cumsum(dt[:-1, -1])))
        t = starts[:, None] + dt
        t_start = float(t[-1, -1])
        theta = 720.0 * np.arange(c0, c1)[:, None] + GRID_STEP_DEG * np.arange(N_GRID + 1)
        yield FineBlock(theta_deg=theta, t=t, omega=omega, gas_torque=tq)
