"""The ECU's status signals at the rig's status rate: what the bike says about itself."""

from __future__ import annotations

import numpy as np

from crankbeat.logger.sim.crank import SlowTrack

STATUS_ROLES = ("engine_speed", "throttle", "gear", "coolant", "road_speed")
COOLANT_TAU_S = 240.0


def status_rate(rig) -> float | None:
    """Fastest rate of the messages carrying status roles (None when the rig has none).

    The signals are computed at this rate; :mod:`logger.sim.canframes` resamples them for each
    message at its own rate.
    """
    rates = [msg.rate_hz or 100.0 for msg in rig.messages
             if any(s.role in STATUS_ROLES for s in msg.signals)]
    return max(rates) if rates else None


def fill(ride, track: SlowTrack, cycle_t: np.ndarray) -> None:
    """Set ``ride.status_t`` and ``ride.status`` (roles the rig does not carry are still given)."""
    rate = status_rate(ride.rig)
    if rate is None:
        ride.status_t, ride.status = np.empty(0), {}
        return
    sc = ride.scenario
    t = np.arange(1, int(np.floor(sc.duration * rate)) + 1) / rate
    edges = ride.tooth_time - sc.start_time
    per_rev = ride.rig.wheel.real_teeth
    # The ECU's speed: one wheel revolution of edges before the frame (as ECUs commonly average).
    i = np.clip(np.searchsorted(edges, t, side="right") - 1, per_rev, len(edges) - 1)
    rpm = 60.0 / (edges[i] - edges[i - per_rev])
    starts = cycle_t[:-1]
    cyc = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, len(track.t) - 1)
    c0, c1 = sc.coolant_c
    ride.status_t = t + sc.start_time
    ride.status = {
        "engine_speed": rpm,
        "throttle": np.interp(t, starts, track.throttle),
        "gear": track.gear[cyc].astype(float),
        "coolant": c1 + (c0 - c1) * np.exp(-t / COOLANT_TAU_S),
        "road_speed": np.interp(t, starts, track.road_kmh),
    }
