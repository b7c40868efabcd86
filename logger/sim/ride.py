"""``simulate(rig, scenario) -> SimRide``: one simulated ride with its complete ground truth."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import firing_angles
from crankbeat.errors import InputError
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.sim import crank, driveline, firing, geared
from crankbeat.logger.sim.profile import Profile
from crankbeat.logger.sim.scenario import Scenario
from crankbeat.logger.sim.teeth import cam_levels, edges_between, hermite, wheel_errors

#: Ground truth of every firing event of the simulated ride.
TRUTH_DTYPE = np.dtype(
    [
        ("t", "f8"),  # s, firing TDC on the CAN time base
        ("cycle", "i8"),  # working cycle since the ride start
        ("cylinder", "i2"),  # 1-based
        ("fired", "?"),  # any combustion at all
        ("burn_fraction", "f8"),  # 1 normal, 0 misfire / fuel cut, between: partial burn
        ("retard_deg", "f8"),  # ignition retard of a fault, degrees
        ("rpm", "f8"),  # mean crank speed over the 720/n_cyl degrees after TDC
        ("throttle", "f8"),  # %
        ("rough", "?"),  # on a rough-road section
        ("fuel_cut", "?"),  # overrun fuel cut: no combustion expected
    ]
)

_STREAMS = ("combustion", "phase", "faults", "wheel", "road", "accel", "can", "serial",
            "cylinders")


@dataclass
class AccelTruth:
    """Samples of one accelerometer board as the device took them."""

    t: np.ndarray  # (n,) s, true sample time on the CAN time base
    device_raw: np.ndarray  # (n,) int64, device clock in its raw unit, wrapped at its modulo
    seq: np.ndarray  # (n,) int64, frame sequence number (unwrapped count)
    xyz: np.ndarray  # (n, 3) float64, g, sensor axes (before quantisation)


@dataclass
class SimRide:
    """A simulated ride: what the sensors saw and what really happened.

    Times are seconds on the CAN time base (``scenario.start_time`` at the ride start).
    """

    rig: Rig
    scenario: Scenario
    engine: Engine  # the engine as simulated (may differ from the rig's: true_layout)
    tooth_time: np.ndarray  # (n,) falling-edge times of every physical tooth
    tooth_number: np.ndarray  # (n,) int16, 0 = first tooth after the gap
    tooth_cam: np.ndarray  # (n,) int8, cam level at each edge (-1: no cam)
    tooth_angle: np.ndarray  # (n,) unwrapped crank degrees, 0 = cylinder 1 firing TDC, cycle 0
    tooth_omega: np.ndarray  # (n,) rad/s, true crank speed at each edge
    tooth_gas_torque: np.ndarray  # (n,) N·m, total gas torque at each edge
    tooth_error_deg: np.ndarray  # (real_teeth,) spacing error of each physical tooth
    cylinder_factor: np.ndarray  # (n_cyl,) fixed heat factor of each cylinder (mean 1)
    status_t: np.ndarray  # (m,) times of the status frames
    status: dict[str, np.ndarray]  # role -> (m,): engine_speed, throttle, gear, coolant, road_speed
    events: np.ndarray  # TRUTH_DTYPE
    accel: dict[str, AccelTruth] = field(default_factory=dict)
    #: (c+1,) time of crank angle 720c (start of each working cycle), s
    cycle_t: np.ndarray = field(default_factory=lambda: np.empty(0))
    #: (c,) friction torque of each cycle, N·m
    cycle_friction: np.ndarray = field(default_factory=lambda: np.empty(0))
    #: (c,) load on the crank (shaft: controller, road, vehicle inertia), N·m
    cycle_load: np.ndarray = field(default_factory=lambda: np.empty(0))
    seeds: dict[str, np.random.SeedSequence] = field(default_factory=dict, repr=False)

    @property
    def effective_inertia_kgm2(self) -> float:
        """Mean crank inertia as simulated: crank, flywheel, reciprocating share, geared part."""
        j = float(np.mean(crank.inertia_table(self.engine)[:-1]))
        return j + geared.referred_inertia(self.scenario.physics)

    @property
    def start_time(self) -> float:
        return self.scenario.start_time

    @property
    def end_time(self) -> float:
        return self.scenario.start_time + self.scenario.duration

    def rng(self, purpose: str) -> np.random.Generator:
        """A fresh generator for one purpose (``"can"``, ``"serial"``, ...), the same every call."""
        return np.random.default_rng(self.seeds[purpose])


def simulated_engine(rig: Rig, scenario: Scenario) -> Engine:
    """The rig's engine, or the scenario's ``true_layout`` with the rig's geometry."""
    eng = rig.engine
    if scenario.engine.true_layout:
        from crankbeat.logger.rig import load_layout

        lay = load_layout(scenario.engine.true_layout)
        eng = eng.with_geometry(
            name=lay.name, stroke_cycle=lay.stroke_cycle, pin_deg=lay.pin_deg,
            bank_deg=lay.bank_deg, position_m=lay.position_m, firing_order=lay.firing_order,
            firing_deg=lay.firing_deg,
        )
    if eng.stroke_cycle != 4:
        raise InputError(
            f"the simulator models 4-stroke engines only, got {eng.stroke_cycle}-stroke"
        )
    return eng.with_geometry(inertia_kgm2=eng.inertia_kgm2 * scenario.physics.inertia_scale)


def _first_pass(scenario, engine, profile, fire, noise, n_max, factor):
    """Steer the crank with tabulated works and freeze every event's decisions."""
    n_cyl = engine.n_cylinders
    shape = (n_max + 2, n_cyl)
    rpm, thr = np.zeros(shape), np.zeros(shape)
    burn, ret = np.ones(shape), np.zeros(shape)
    cut, rough = np.zeros(shape, bool), np.zeros(shape, bool)
    table = firing.WorkTable(engine, scenario, fire)
    spec = scenario.engine
    u = noise["faults"]

    cutting = [False]

    def decide(c, t, omega, tg):
        r = omega * 30.0 / math.pi
        th = tg[2]
        # Overrun cut with hysteresis, as ECUs do: it starts above fuel_cut_rpm and lasts until
        # the throttle opens or the crank falls below fuel_cut_rpm - fuel_cut_hysteresis_rpm.
        if not (spec.fuel_cut and th < spec.fuel_cut_throttle):
            cutting[0] = False
        elif r > spec.fuel_cut_rpm:
            cutting[0] = True
        elif r < spec.fuel_cut_rpm - spec.fuel_cut_hysteresis_rpm:
            cutting[0] = False
        fc = cutting[0]
        for k in range(n_cyl):
            te = t + fire[k] / (6.0 * r)
            b, d = firing.fault_effects(scenario.faults, k + 1, c, te, float(u[c + 1, k]))
            burn[c + 1, k] = 0.0 if fc else b
            ret[c + 1, k] = d
        rpm[c + 1], thr[c + 1], cut[c + 1], rough[c + 1] = r, th, fc, tg[5] > 0

    def works(c, r, th):
        w, m, v = table.summary(r, th, burn[c + 1].tolist())
        nominal = table.summary(r, th, [0.0 if cut[c + 1, 0] else 1.0] * n_cyl)[0]
        return w, m, v, nominal

    track = crank.slow_loop(scenario, engine, profile, n_max, works=works, decide=decide,
                            t_end=scenario.duration + 0.3)
    n = len(track.t)
    # Cycle -1 and cycle n borrow their neighbours' operating point, without faults.
    for src, dst in ((1, 0), (n, n + 1)):
        rpm[dst], thr[dst], cut[dst], rough[dst] = rpm[src], thr[src], cut[src], rough[src]
        burn[dst] = 0.0 if cut[src].any() else 1.0
    rows = slice(0, n + 2)
    params = firing.event_params(
        scenario, engine, rpm=rpm[rows], throttle=thr[rows], burn_fraction=burn[rows],
        retard=ret[rows], fuel_cut=cut[rows], rough=rough[rows],
        heat_noise=noise["combustion"][rows], phase_noise=noise["phase"][rows],
        cylinder_factor=factor,
    )
    return track, params


def _engine_alone(scenario, engine, gas, track, wheel, errors, say):
    """Edges of the fine engine-alone solution: angle, tooth, rev, time, speed, gas torque."""
    parts: dict[str, list[np.ndarray]] = {k: [] for k in ("ang", "tooth", "rev", "t", "om", "tq")}
    cycle_t = [0.0]
    for blk in crank.fine_blocks(engine, scenario, gas, track):
        th = np.concatenate((blk.theta_deg[:, :-1].ravel(), blk.theta_deg[-1:, -1]))
        tt = np.concatenate((blk.t[:, :-1].ravel(), blk.t[-1:, -1]))
        om = np.concatenate((blk.omega[:, :-1].ravel(), blk.omega[-1:, -1]))
        tq = np.concatenate((blk.gas_torque[:, :-1].ravel(), blk.gas_torque[-1:, -1]))
        ang, tooth, rev = edges_between(th[0], th[-1], wheel, errors)
        parts["ang"].append(ang)
        parts["tooth"].append(tooth)
        parts["rev"].append(rev)
        parts["t"].append(hermite(ang, th, tt, math.radians(1.0) / om))
        parts["om"].append(np.interp(ang, th, om))
        parts["tq"].append(np.interp(ang, th, tq))
        cycle_t.extend(blk.t[:, -1].tolist())
        say("crank", (len(cycle_t) - 1) / max(len(track.t), 1))
    out = {k: np.concatenate(v) for k, v in parts.items()}
    return out, np.asarray(cycle_t)


def _truth(scenario, engine, params, fire, ang, t, omega, n_cycles):
    n_cyl = engine.n_cylinders
    cyc = np.repeat(np.arange(n_cycles), n_cyl)
    cyl = np.tile(np.arange(n_cyl), n_cycles)
    tdc = 720.0 * cyc + fire[cyl]
    win = 720.0 / n_cyl
    rad = np.radians(ang)
    t_tdc = hermite(np.radians(tdc), rad, t, 1.0 / omega)
    t_end = hermite(np.radians(tdc + win), rad, t, 1.0 / omega)
    ev = np.zeros(len(cyc), dtype=TRUTH_DTYPE)
    ev["t"] = t_tdc + scenario.start_time
    ev["cycle"], ev["cylinder"] = cyc, cyl + 1
    bf = params.burn_fraction[cyc + 1, cyl]
    ev["burn_fraction"], ev["fired"] = bf, bf > 0
    ev["retard_deg"] = params.retard[cyc + 1, cyl]
    ev["rpm"] = (win / 6.0) / (t_end - t_tdc)
    ev["throttle"] = params.throttle[cyc + 1, cyl]
    ev["rough"] = params.rough[cyc + 1, cyl]
    ev["fuel_cut"] = params.fuel_cut[cyc + 1, cyl]
    keep = (t_end < t[-1]) & (t_tdc >= 0.0) & (t_tdc < scenario.duration)
    return ev[keep]


def simulate(
    rig: Rig, scenario: Scenario, *, progress: Callable[[str, float], None] | None = None
) -> SimRide:
    """Simulate a ride of ``rig`` following ``scenario``.

    Parameters
    ----------
    rig : Rig
        The instrumented bike (wheel, CAN layout, sensors; the engine unless the scenario gives a
        ``true_layout``).
    scenario : Scenario
        Segments, faults, variations and the seed. The same scenario gives the same ride.
    progress : callable(stage, fraction), keyword-only, optional
        Called now and then with the stage name and 0..1, for a progress display.

    Returns
    -------
    SimRide

    Notes
    -----
    The engine is running at the first segment's target from the first instant (no cranking
    or stall); 4-stroke engines only. Method and approximations: :mod:`logger.sim.crank`
    (angle-domain energy solution, per-cycle controller) and :mod:`logger.sim.driveline`
    (first-order time correction for the torsional mode and the road input).
    """
    from crankbeat.logger.sim import accel, status

    say = progress or (lambda stage, frac: None)
    engine = simulated_engine(rig, scenario)
    fire = firing_angles(engine)
    profile = Profile(scenario)
    root = np.random.SeedSequence(scenario.seed)
    seeds = dict(zip(_STREAMS, root.spawn(len(_STREAMS))))
    rev_max = max(rig.limits.rev_limit_rpm, 12000.0)
    n_max = int(math.ceil((scenario.duration + 0.5) * rev_max / 120.0)) + 16
    shape = (n_max + 2, engine.n_cylinders)
    noise = {
        "combustion": np.random.default_rng(seeds["combustion"]).standard_normal(shape),
        "phase": np.random.default_rng(seeds["phase"]).standard_normal(shape),
        "faults": np.random.default_rng(seeds["faults"]).random(shape),
    }
    say("planning", 0.0)
    spread = np.random.default_rng(seeds["cylinders"]).standard_normal(engine.n_cylinders)
    factor = 1.0 + scenario.physics.cylinder_spread * spread
    factor = factor / factor.mean()
    first, params = _first_pass(scenario, engine, profile, fire, noise, n_max, factor)
    n = len(first.t)
    say("planning", 0.5)
    gas = firing.GasTorque(engine, scenario, params, fire)
    w = crank.cycle_works(gas, n)
    track = crank.slow_loop(
        scenario, engine, profile, n,
        works=lambda c, r, th: (w.work[c], w.mean_cum[c], w.var_cum[c], first.nominal_work[c]),
    )
    say("crank", 0.0)
    wheel = rig.wheel
    wheel_rng = np.random.default_rng(seeds["wheel"])
    errors = wheel_errors(wheel, scenario.wheel.error_rms_deg, wheel_rng)
    edges, cycle_t = _engine_alone(scenario, engine, gas, track, wheel, errors, say)
    say("driveline", 0.0)
    j_mean = float(np.mean(crank.inertia_table(engine)))
    t_g, om_g = geared.apply(
        scenario.physics, j_mean, theta_rad=np.radians(edges["ang"]), t_alone=edges["t"],
        omega_alone=edges["om"], cycle_t=cycle_t,
    )
    t, omega, _, _ = driveline.apply(
        scenario, track, j_mean + geared.referred_inertia(scenario.physics),
        theta_rad=np.radians(edges["ang"]), t_alone=t_g, omega_alone=om_g, cycle_t=cycle_t,
        rng=np.random.default_rng(seeds["road"]),
    )
    events = _truth(scenario, engine, params, fire, edges["ang"], t, omega, n)
    cycle_true = hermite(np.radians(720.0 * np.arange(len(cycle_t))), np.radians(edges["ang"]),
                         t, 1.0 / omega)
    keep = t < scenario.duration
    ride = SimRide(
        rig=rig, scenario=scenario, engine=engine,
        tooth_time=t[keep] + scenario.start_time,
        tooth_number=edges["tooth"][keep].astype(np.int16),
        tooth_cam=cam_levels(edges["rev"][keep], wheel),
        tooth_angle=edges["ang"][keep],
        tooth_omega=omega[keep],
        tooth_gas_torque=edges["tq"][keep],
        tooth_error_deg=errors, cylinder_factor=factor,
        status_t=np.empty(0), status={}, events=events, seeds=seeds,
        cycle_t=cycle_true + scenario.start_time, cycle_friction=track.friction,
        cycle_load=track.shaft,
    )
    say("status", 0.0)
    status.fill(ride, track, cycle_t)
    say("accelerometer", 0.0)
    accel.fill(ride, track, cycle_t)
    say("done", 1.0)
    return ride
