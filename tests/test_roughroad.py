"""Rough-road detection on analytic signals: engine orders plus a burst of band-limited noise."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from crankbeat.dsp.roughroad import RoughRoadDetector, rough_road_spans, span_mask
from crankbeat.errors import InputError

FS = 2000.0


def engine_orders(t: np.ndarray, rpm: float, amps=(0.5, 0.3, 0.1)) -> np.ndarray:
    """Orders 1, 2 and 0.5 of a steady engine on three axes, g (analytic)."""
    f = rpm / 60.0
    one = amps[0] * np.cos(2 * np.pi * f * t) + amps[1] * np.cos(4 * np.pi * f * t)
    one = one + amps[2] * np.cos(np.pi * f * t)
    return np.stack((one, 0.7 * one, 0.4 * one), axis=1)


def road_burst(t: np.ndarray, t0: float, t1: float, rms: float, seed: int) -> np.ndarray:
    """Gaussian noise band-limited to 1-15 Hz (scipy Butterworth), ``rms`` g per axis, on
    [t0, t1)."""
    rng = np.random.default_rng(seed)
    sos = signal.butter(4, (1.0, 15.0), "bandpass", fs=FS, output="sos")
    n = rng.standard_normal((len(t), 3))
    y = signal.sosfilt(sos, n, axis=0)
    y *= rms / np.std(y[len(t) // 4:], axis=0)
    return y * ((t >= t0) & (t < t1))[:, None]


def ride(seconds=60.0, burst=(20.0, 28.0), rpm=4000.0, seed=3):
    t = np.arange(int(seconds * FS)) / FS
    rng = np.random.default_rng(seed + 1)
    x = engine_orders(t, rpm) + 0.003 * rng.standard_normal((len(t), 3))
    if burst:
        x = x + road_burst(t, *burst, rms=0.1, seed=seed)
    return t, x


def test_burst_is_found_with_the_window_lag_at_most():
    t, x = ride()
    spans = rough_road_spans(t, x, FS)
    assert len(spans) == 1
    a, b = spans[0]
    # the span covers the burst, late by at most one window at the start (the detector backs
    # off one window) and early by at most a window at the end
    assert 19.3 <= a <= 20.3
    assert 27.4 <= b <= 28.6


def test_engine_orders_alone_are_not_rough_road():
    t, x = ride(burst=None)
    assert rough_road_spans(t, x, FS) == []


def test_single_missing_firing_does_not_open_a_span():
    # one firing missing: the torque-driven orders (here 0.5 and 1) vanish for one 720° cycle
    # (30 ms at 4000 rpm) while the inertia-driven order 2 stays (analytic model)
    rpm = 4000.0
    t, x = ride(burst=None, rpm=rpm)
    cycle = (t >= 30.0) & (t < 30.0 + 120.0 / rpm)
    f = rpm / 60.0
    torque = 0.5 * np.cos(2 * np.pi * f * t[cycle]) + 0.1 * np.cos(np.pi * f * t[cycle])
    x[cycle] -= np.stack((torque, 0.7 * torque, 0.4 * torque), axis=1)
    assert rough_road_spans(t, x, FS) == []


def test_low_idle_half_order_is_gated_by_rpm():
    # at 840 rpm the half order is 7 Hz, inside the 2-8 Hz band: without rpm the engine itself
    # fills the band (after a quiet start that set the median); with rpm those frames are
    # ignored
    t = np.arange(int(40 * FS)) / FS
    x = 0.003 * np.random.default_rng(0).standard_normal((len(t), 3))
    idle = t >= 20
    x[idle] += engine_orders(t[idle], 840.0, amps=(0.2, 0.1, 0.3))
    rpm = np.where(idle, 840.0, 4000.0)
    assert len(rough_road_spans(t, x, FS)) == 1
    assert rough_road_spans(t, x, FS, rpm=rpm) == []


def test_streaming_equals_whole_and_reports_late_by_at_most_hold():
    t, x = ride()
    whole = rough_road_spans(t, x, FS)
    det = RoughRoadDetector(FS)
    rng = np.random.default_rng(5)
    cuts = np.sort(rng.choice(np.arange(1, len(t)), 60, replace=False))
    got = []
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, len(t)]):
        step = det.push(t[a:b], x[a:b])
        for span in step.closed:
            # causal with a bounded delay: reported within hold + a frame + this chunk
            assert t[b - 1] - span[1] <= det.hold_s + det.frame_s + (t[b - 1] - t[a]) + 1e-9
        got += step.closed
    got += det.finish().closed
    assert got == whole


def test_span_mask():
    m = span_mask([0.0, 1.0, 2.0, 3.0], [(0.5, 2.0)])
    assert m.tolist() == [False, True, True, False]


def test_bad_input():
    with pytest.raises(InputError, match="band_hz"):
        RoughRoadDetector(FS, band_hz=(8.0, 2.0))
    with pytest.raises(InputError, match=r"shape \(3, 3\)"):
        RoughRoadDetector(FS).push(np.arange(3.0), np.zeros((3, 2)))
