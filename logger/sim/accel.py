"""Accelerometer boards of the simulated bike: what reaches a sensor and when it is sampled.

Sources, in bike axes (x forward, y left, z up; the crank lies along y and turns forward over the
top): the reciprocating shaking forces and rocking couples of the engine's layout (exact
slider-crank, :mod:`dsp.layout`), the reaction to the fluctuating engine torque (gas plus
reciprocating inertia), the road (more on rough sections), gravity (+1 g along "up", as any
accelerometer at rest reads) and sensor noise. Forces and moments reach the sensor through a
mount transfer function of two damped resonances (the bar's bending modes, say) with unit gain
at low frequency.

The device samples on its own clock, which starts at an offset and runs fast by ``drift_ppm``;
its time stamps are integers of its unit (µs) and wrap at the sensor's modulo.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import bilinear, butter, lfilter, sosfilt

from crankbeat.dsp.kinematics import reciprocating_torque
from crankbeat.dsp.layout import shaking_couples, shaking_forces
from crankbeat.logger.sim.teeth import hermite

CYLINDER_TILT_DEG = 30.0  # cylinder 1's axis leans forward from vertical
FORCE_GAIN_G_PER_N = 6.0e-5  # low-frequency sensor acceleration per newton of shaking force
MOMENT_GAIN_G_PER_NM = 1.2e-4  # ... per N·m of rocking couple or torque reaction
SENSOR_NOISE_G = 0.01
#: Where a sensor at each location sits relative to the crank's middle, m (x fwd, y left, z up).
LOCATIONS = {
    "bar": (0.55, 0.35, 0.50), "seat": (-0.35, 0.0, 0.30), "footpeg": (-0.15, 0.18, -0.15),
    "tank": (0.15, 0.0, 0.35), "frame": (0.30, 0.10, 0.20), "engine": (0.0, 0.10, 0.0),
}
AXES = {"forward": (1, 0, 0), "back": (-1, 0, 0), "left": (0, 1, 0), "right": (0, -1, 0),
        "up": (0, 0, 1), "down": (0, 0, -1)}


def mount_filter(fs: float, hz: tuple[float, ...], zeta: float):
    """Discrete (b, a) of the mount: the mean of unit-gain damped resonances at ``hz``."""
    num = np.zeros(1)
    den = np.ones(1)
    for f in hz:
        w = 2 * np.pi * f
        d = np.array([1.0, 2 * zeta * w, w * w])
        num = np.polyadd(np.polymul(num, d), np.polymul(den, [w * w / len(hz)]))
        den = np.polymul(den, d)
    return bilinear(num, den, fs=fs)


def sample_times(sensor, scenario, rng: np.random.Generator):
    """(true times from the ride start, device raw stamps, device seconds) of every sample."""
    ser = scenario.serial
    rate = 1.0 + ser.drift_ppm * 1e-6
    first = rng.random() / sensor.sample_rate_hz
    n = int(np.floor((scenario.duration - first) * sensor.sample_rate_hz * rate))
    dev = ser.clock_offset_s + first * rate + np.arange(n) / sensor.sample_rate_hz
    t = (dev - ser.clock_offset_s) / rate
    raw = np.rint(dev / sensor.device_time_unit_s).astype(np.int64)
    raw = np.mod(raw, sensor.device_time_modulo)
    return t, raw


def fill(ride, track, cycle_t: np.ndarray) -> None:
    """Set ``ride.accel`` for every sensor of the rig."""
    from crankbeat.logger.sim.ride import AccelTruth

    sc = ride.scenario
    for idx, sensor in enumerate(ride.rig.sensors):
        rng = np.random.default_rng([*ride.seeds["accel"].generate_state(2), idx])
        t, raw = sample_times(sensor, sc, rng)
        xyz = sensor_signal(ride, track, cycle_t, sensor, t, rng)
        seq0 = int(rng.integers(0, sensor.sequence_modulo))
        ride.accel[sensor.name] = AccelTruth(
            t=t + sc.start_time, device_raw=raw, seq=seq0 + np.arange(len(t)), xyz=xyz
        )


BLOCK = 1 << 18  # samples per block: bounds the temporaries of a long ride


def sensor_signal(ride, track, cycle_t, sensor, t: np.ndarray, rng) -> np.ndarray:
    """Acceleration at the sensor, g, in its own axes, shape (n, 3).

    Computed in blocks with the filters' states carried over, so memory stays bounded by the
    block size whatever the ride's length.
    """
    sc, eng = ride.scenario, ride.engine
    edges = ride.tooth_time - sc.start_time
    theta_rad = np.radians(ride.tooth_angle)
    fs = sensor.sample_rate_hz
    phys = sc.physics
    tilt = np.radians(CYLINDER_TILT_DEG)
    u1 = np.array([np.sin(tilt), 0.0, np.cos(tilt)])  # along cylinder 1
    u2 = np.array([np.cos(tilt), 0.0, -np.sin(tilt)])  # 90° ahead in the crank's rotation
    lever = np.asarray(LOCATIONS.get(sensor.location, LOCATIONS["frame"]))
    hz = tuple(f for f in phys.mount_hz if f < 0.45 * fs)
    mount = mount_filter(fs, hz, phys.mount_damping) if hz else None
    zi_mount = None
    if mount is not None:
        zi_mount = np.zeros((max(len(mount[0]), len(mount[1])) - 1, 3))
    sos = butter(2, [3.0, min(60.0, 0.4 * fs)], btype="bandpass", fs=fs, output="sos")
    zi_road = np.zeros((sos.shape[0], 2, 3))
    sosfilt(sos, rng.standard_normal((1000, 3)), axis=0, zi=zi_road)  # settle the road filter
    # The road filter's output std for unit white noise, to scale it to g.
    road_std = float(np.sqrt(np.sum(sosfilt(sos, np.r_[1.0, np.zeros(4095)]) ** 2)))
    starts = cycle_t[:-1]
    dirs = np.array([AXES[a] for a in sensor.axes], dtype=float)  # (3 sensor axes, 3 bike axes)
    n = len(t)
    out = np.empty((n, 3))
    half = 200  # the torque's running mean needs this much context each side
    for b0 in range(0, n, BLOCK):
        b1 = min(b0 + BLOCK, n)
        p0, p1 = max(b0 - half, 0), min(b1 + half, n)
        tb = t[p0:p1]
        theta = np.degrees(hermite(tb, edges, theta_rad, ride.tooth_omega))
        omega = np.interp(tb, edges, ride.tooth_omega)
        torque = np.interp(tb, edges, ride.tooth_gas_torque)
        torque = torque + reciprocating_torque(theta, omega, eng)
        torque = (torque - np.convolve(torque, np.ones(401) / 401, mode="same"))[b0 - p0 : b1 - p0]
        theta, omega = theta[b0 - p0 : b1 - p0], omega[b0 - p0 : b1 - p0]
        force2 = shaking_forces(eng, theta, omega, model="exact")
        couple2 = shaking_couples(eng, theta, omega, model="exact")
        force = force2[:, :1] * u1 + force2[:, 1:] * u2
        moment = couple2[:, :1] * u2 - couple2[:, 1:] * u1  # y × u1 = u2, y × u2 = -u1
        moment[:, 1] -= torque  # the block reacts to the engine torque about the crank (y)
        acc = FORCE_GAIN_G_PER_N * force + MOMENT_GAIN_G_PER_NM * np.cross(moment, lever) / 0.5
        if mount is not None:
            acc, zi_mount = lfilter(mount[0], mount[1], acc, axis=0, zi=zi_mount)
        # Road: vertical mostly, some fore-aft, more on rough sections.
        cyc = np.clip(np.searchsorted(starts, t[b0:b1], side="right") - 1, 0, len(track.rough) - 1)
        level = phys.road_noise_g * (1.0 + 4.0 * track.rough[cyc])
        road, zi_road = sosfilt(sos, rng.standard_normal((b1 - b0, 3)), axis=0, zi=zi_road)
        acc = acc + road / road_std * level[:, None] * np.array([0.4, 0.25, 1.0])
        acc[:, 2] += 1.0
        acc = acc + SENSOR_NOISE_G * rng.standard_normal(acc.shape)
        out[b0:b1] = acc @ dirs.T
    return out
