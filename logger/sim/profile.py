"""The scenario's segments as functions of ride time: target speed, throttle, gear, clutch, road.

A gear change at a segment boundary opens the clutch for :data:`SHIFT_S` at the start of the new
segment: the target crank speed ramps from the old segment's end to the new one's start, and for
a shift between two gears the throttle is closed (the rider rolls off, the ECU may cut fuel).
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass

import numpy as np

from crankbeat.logger.sim.scenario import Physics, Scenario

SHIFT_S = 0.35


def overall_ratio(physics: Physics, gear) -> np.ndarray:
    """Crank turns per rear-wheel turn in ``gear`` (NaN in neutral)."""
    gear = np.asarray(gear, dtype=int)
    ratios = np.concatenate(([np.nan], physics.gear_ratios))
    g = np.clip(gear, 0, len(physics.gear_ratios))
    return ratios[g] * physics.primary_ratio * physics.final_ratio


@dataclass
class Targets:
    """Profile values at given times (arrays of the same shape)."""

    omega_ref: np.ndarray  # rad/s, target crank speed
    omega_rate: np.ndarray  # rad/s², slope of the target
    throttle: np.ndarray  # %
    gear: np.ndarray  # int, 0 = neutral
    engaged: np.ndarray  # bool, clutch closed and in gear
    rough: np.ndarray  # road roughness intensity


class Profile:
    """Evaluate a scenario's targets at any ride time (s from the ride start)."""

    def __init__(self, scenario: Scenario) -> None:
        self.scenario = scenario
        phys = scenario.physics
        segs = scenario.segments
        if any(s.gear > len(phys.gear_ratios) or s.gear < 0 for s in segs):
            from crankbeat.errors import InputError

            bad = next(s.gear for s in segs if s.gear > len(phys.gear_ratios) or s.gear < 0)
            raise InputError(f"segment gear {bad} is not 0..{len(phys.gear_ratios)}")
        self.start = np.concatenate(([0.0], np.cumsum([s.duration for s in segs])))
        self.gear = np.array([s.gear for s in segs])
        w0, w1 = [], []
        for s in segs:
            if s.rpm is not None:
                a, b = (x * np.pi / 30.0 for x in s.rpm)
            else:
                g = float(overall_ratio(phys, s.gear))
                kmh = s.road_kmh or (0.0, 0.0)
                a, b = (x / 3.6 / phys.wheel_radius_m * g for x in kmh)
            w0.append(a)
            w1.append(b)
        self.w0, self.w1 = np.array(w0), np.array(w1)
        self.thr0 = np.array([s.throttle[0] for s in segs])
        self.thr1 = np.array([s.throttle[1] for s in segs])
        self.rough = np.array([s.rough for s in segs])
        prev_gear = np.concatenate(([segs[0].gear], self.gear[:-1]))
        self.shift = self.gear != prev_gear
        self.shift_closed = self.shift & (self.gear > 0) & (prev_gear > 0)
        self._start_list = self.start.tolist()
        self._gear_list = [int(g) for g in self.gear]
        self._w0, self._w1 = self.w0.tolist(), self.w1.tolist()
        self._t0, self._t1 = self.thr0.tolist(), self.thr1.tolist()
        self._shift, self._closed = self.shift.tolist(), self.shift_closed.tolist()
        self._rough = self.rough.tolist()

    def at_scalar(self, t: float) -> tuple[float, float, float, int, bool, float]:
        """(omega_ref, omega_rate, throttle, gear, engaged, rough) at one time; plain floats.

        Same values as :meth:`at`, for the per-cycle loop where numpy's per-call cost dominates.
        """
        start = self._start_list
        i = min(max(bisect.bisect_right(start, t) - 1, 0), len(self._gear_list) - 1)
        dur = start[i + 1] - start[i]
        u = min(max((t - start[i]) / dur, 0.0), 1.0)
        w0, w1, th0, th1 = self._w0[i], self._w1[i], self._t0[i], self._t1[i]
        w = w0 + (w1 - w0) * u
        rate = (w1 - w0) / dur
        thr = th0 + (th1 - th0) * u
        since = t - start[i]
        gear = self._gear_list[i]
        in_shift = self._shift[i] and since < SHIFT_S
        if in_shift:
            ts = min(SHIFT_S, dur)
            prev_end = self._w1[max(i - 1, 0)]
            w_after = w0 + (w1 - w0) * (ts / dur)
            w = prev_end + (w_after - prev_end) * since / ts
            rate = (w_after - prev_end) / ts
            if self._closed[i]:
                thr = 0.0
            else:
                prev_thr = self._t1[max(i - 1, 0)]
                thr_after = th0 + (th1 - th0) * (ts / dur)
                thr = prev_thr + (thr_after - prev_thr) * since / ts
        return w, rate, thr, gear, gear > 0 and not in_shift, self._rough[i]

    def at(self, t) -> Targets:
        t = np.asarray(t, dtype=float)
        i = np.clip(np.searchsorted(self.start, t, side="right") - 1, 0, len(self.gear) - 1)
        dur = self.start[i + 1] - self.start[i]
        u = np.clip((t - self.start[i]) / dur, 0.0, 1.0)
        w = self.w0[i] + (self.w1[i] - self.w0[i]) * u
        rate = (self.w1[i] - self.w0[i]) / dur
        thr = self.thr0[i] + (self.thr1[i] - self.thr0[i]) * u
        since = t - self.start[i]
        in_shift = self.shift[i] & (since < SHIFT_S)
        # During the clutch-open transition the target ramps from the old segment's end.
        prev_end = self.w1[np.maximum(i - 1, 0)]
        ts = np.minimum(SHIFT_S, dur)
        w_after = self.w0[i] + (self.w1[i] - self.w0[i]) * (ts / dur)
        w = np.where(in_shift, prev_end + (w_after - prev_end) * since / ts, w)
        rate = np.where(in_shift, (w_after - prev_end) / ts, rate)
        # Pulling away the rider opens the throttle while letting the clutch in; shifting
        # between gears he rolls it off.
        prev_thr = self.thr1[np.maximum(i - 1, 0)]
        thr_after = self.thr0[i] + (self.thr1[i] - self.thr0[i]) * (ts / dur)
        thr = np.where(in_shift, prev_thr + (thr_after - prev_thr) * since / ts, thr)
        thr = np.where(in_shift & self.shift_closed[i], 0.0, thr)
        gear = self.gear[i]
        engaged = (gear > 0) & ~in_shift
        return Targets(w, rate, thr, gear, engaged, self.rough[i])
