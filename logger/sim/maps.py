"""Operating-point maps of the simulated engine: air, ignition, burn duration, friction.

Invented but plausible shapes for a sporty 4-stroke twin. All take rpm and throttle (%) arrays
and broadcast.
"""

from __future__ import annotations

import numpy as np

BAR = 1.0e5


def manifold_pressure(rpm, throttle_pct):
    """Manifold pressure, Pa: ~0.3 bar at closed throttle (lower when revving), ~1 bar at WOT."""
    rpm = np.asarray(rpm, dtype=float)
    thr = np.asarray(throttle_pct, dtype=float)
    closed = 0.32 - 0.10 * np.clip((rpm - 1300.0) / 8000.0, 0.0, 1.0)
    # The throttle's effect saturates early, as a butterfly's does (most of the air by ~40 %).
    opening = (1.0 - np.exp(-thr / 16.0)) / (1.0 - np.exp(-100.0 / 16.0))
    return BAR * (closed + (0.99 - closed) * opening)


def volumetric_efficiency(rpm):
    """Trapped charge at IVC relative to manifold pressure (tuned intake peak near 7000 rpm)."""
    rpm = np.asarray(rpm, dtype=float)
    return 0.86 + 0.14 * np.exp(-(((rpm - 7000.0) / 4000.0) ** 2))


def load_fraction(p_manifold):
    """0 at closed throttle, 1 at WOT, from manifold pressure."""
    return np.clip((np.asarray(p_manifold, dtype=float) / BAR - 0.22) / 0.77, 0.0, 1.0)


def air_fuel_ratio(load):
    """Rich at full load for component protection, stoichiometric at part load."""
    return 14.7 - 1.7 * np.clip((np.asarray(load, dtype=float) - 0.7) / 0.3, 0.0, 1.0)


def burn_duration(rpm):
    """10-90 %-ish Wiebe duration, degrees: ~40° at idle rising to ~70° at the limiter."""
    return 40.0 + 30.0 * np.clip((np.asarray(rpm, dtype=float) - 1300.0) / 9200.0, 0.0, 1.0)


def spark_advance(rpm, load):
    """Ignition advance, degrees before TDC (a simple rpm × load map)."""
    rpm = np.asarray(rpm, dtype=float)
    return 10.0 + 22.0 * np.clip((rpm - 1300.0) / 6000.0, 0.0, 1.0) + 8.0 * (1.0 - np.asarray(load))


def ignition_delay(rpm):
    """Spark to start of the Wiebe burn, degrees (about 0.15 ms plus a fixed part)."""
    return 4.0 + 0.9 * np.asarray(rpm, dtype=float) / 1000.0


def combustion_start(rpm, load):
    """Wiebe start angle θ0 relative to firing TDC, degrees (negative = before TDC)."""
    return -spark_advance(rpm, load) + ignition_delay(rpm)


def fmep(rpm, coeffs: tuple[float, float, float]):
    """Friction mean effective pressure, Pa: a + b·krpm + c·krpm², coefficients in bar."""
    k = np.asarray(rpm, dtype=float) / 1000.0
    a, b, c = coeffs
    return BAR * (a + b * k + c * k * k)
