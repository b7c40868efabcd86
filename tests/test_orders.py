"""Order tracking against analytic signals, scipy's PCHIP and the layout's predicted orders."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import predicted_orders
from crankbeat.dsp.orders import (
    AngleResampler,
    AngleSamples,
    OrderMap,
    compare_orders,
    order_map,
    order_spectrum,
    resample_to_angle,
)
from crankbeat.errors import InputError

FS = 2000.0


def wheel_60_2(total_deg: float) -> np.ndarray:
    """Falling-edge angles of a 60-2 wheel (58 teeth, 6° pitch, two missing): common practice."""
    k = np.arange(int(total_deg // 6))
    return 6.0 * k[(k % 60) < 58]


def sweep(rpm0: float, rpm1: float, seconds: float, orders: dict[float, float], *,
          fs: float = FS, pad_s: float = 0.3):
    """Constant angular acceleration from rpm0 to rpm1; x = Σ A_o cos(o θ(t)) (analytic)."""
    acc = (rpm1 - rpm0) / seconds * 6.0  # deg/s², rpm -> deg/s is x 6
    w0 = rpm0 * 6.0

    def angle(t):
        return w0 * t + 0.5 * acc * t * t

    th = wheel_60_2(angle(seconds))
    # the root of angle(t) = th, in the form that stays exact for small acc
    te = 2 * th / (w0 + np.sqrt(w0 * w0 + 2 * acc * th))
    ts = np.arange(-pad_s, seconds + pad_s, 1 / fs)
    theta = np.deg2rad(angle(ts))
    x = sum(a * np.cos(o * theta) for o, a in orders.items())
    return ts, x, te, th


def test_grid_times_are_scipy_pchip_of_time_over_angle():
    # the grid times must be PCHIP (scipy.interpolate.PchipInterpolator) through the edges
    ts, x, te, th = sweep(2500, 6000, 2.0, {1.0: 1.0})
    s = resample_to_angle(ts, x, te, th, fs=FS, samples_per_rev=64)
    ref = PchipInterpolator(th, te)(s.index * 360.0 / 64)
    assert np.max(np.abs(s.t - ref)) < 1e-12


def test_sweep_recovers_first_and_second_order_within_2_percent():
    # x(t) = A1 cos θ + A2 cos 2θ, θ(t) a sweep 2000 -> 9000 rpm: in the angle domain these are
    # pure orders 1 and 2 of amplitudes A1, A2 whatever the speed (definition of an order)
    a1, a2 = 1.0, 0.4
    ts, x, te, th = sweep(2000, 9000, 12.0, {1.0: a1, 2.0: a2})
    m = order_map(resample_to_angle(ts, x, te, th, fs=FS), samples_per_rev=64, revs_per_block=8,
                  rpm_band=500.0, rpm_range=(2000.0, 9000.0))
    used = m.blocks > 0
    assert used.sum() == 14  # every 500-rpm band of the sweep has blocks
    o = m.orders
    amp = m.amplitude[used, 0]
    assert np.all(np.abs(amp[:, o == 1.0] / a1 - 1) < 0.02)
    assert np.all(np.abs(amp[:, o == 2.0] / a2 - 1) < 0.02)
    # the Hann window spreads each line into its two neighbours (half the amplitude each:
    # common practice); beyond those nothing may appear
    near = (np.abs(o - 1.0) <= 0.125) | (np.abs(o - 2.0) <= 0.125)
    others = (o > 0.1) & ~near & (o < 20)
    assert np.max(amp[:, others]) < 0.005 * a1


def test_half_order_resolution():
    # a 4-stroke's half orders: with 4-revolution blocks and a Hann window lines 0.5 order apart
    # are two lines apart and do not leak into each other (Hann leaks into the adjacent line
    # only: common practice); with 2-revolution blocks a rectangular window does the same
    comps = {0.5: 0.3, 1.0: 1.0, 1.5: 0.2, 2.0: 0.6}
    ts, x, te, th = sweep(3000, 3000, 4.0, comps)
    s = resample_to_angle(ts, x, te, th, fs=FS, samples_per_rev=64)
    for revs, window in ((4, "hann"), (2, "boxcar")):
        o, a = order_spectrum(s.x[:, 0], samples_per_rev=64, revs_per_block=revs, window=window)
        for order, amp in comps.items():
            assert a[np.isclose(o, order)][0] == pytest.approx(amp, rel=0.02)
        assert a[np.isclose(o, 2.5)][0] < 0.005


def test_order_spectrum_amplitude_is_peak_value():
    # a sine of amplitude A on a line gives A (coherent gain divided out); between lines the
    # flat-top window keeps it within 0.01 dB = 0.115 % (flat-top scalloping loss: common
    # practice)
    spr, revs = 32, 4
    theta = 2 * np.pi * np.arange(spr * revs * 10) / spr
    o, a = order_spectrum(2.5 * np.sin(3 * theta), samples_per_rev=spr, revs_per_block=revs)
    assert a[o == 3.0][0] == pytest.approx(2.5, rel=1e-9)
    o, a = order_spectrum(2.5 * np.sin(3.125 * theta) + 0.7, samples_per_rev=spr,
                          revs_per_block=revs, window="flattop")
    assert np.max(a[(o > 2.5) & (o < 3.75)]) == pytest.approx(2.5, rel=1.15e-3)
    assert a[0] == pytest.approx(0.7, rel=1e-2)  # the DC line is the mean, not doubled
    o, per_block = order_spectrum(np.sin(3 * theta), samples_per_rev=spr, revs_per_block=revs,
                                  average="none")
    assert per_block.shape == (10, spr * revs // 2 + 1)


def test_high_frequency_tone_does_not_alias_at_low_speed():
    # 900 Hz at 1100 rpm is order 49, above the grid's 32: the order-domain anti-alias filter
    # must keep it from folding down to order 64 - 49 = 15 (sampling theorem)
    rpm = 1100.0
    ts, _, te, th = sweep(rpm, rpm, 3.0, {1.0: 0.0})
    x = np.cos(2 * np.pi * 900.0 * ts) + 0.5 * np.cos(np.deg2rad(rpm * 6.0 * ts) * 2)
    s = resample_to_angle(ts, x, te, th, fs=FS, samples_per_rev=64, rpm_floor=1000.0)
    o, a = order_spectrum(s.x[:, 0], samples_per_rev=64, revs_per_block=8)
    assert a[o == 2.0][0] == pytest.approx(0.5, rel=0.01)
    assert np.max(a[(o > 2.2) & (o < 0.4 * 64)]) < 1e-3


def _pieces(n, k, rng):
    return np.sort(rng.choice(np.arange(1, n), size=k, replace=False))


@pytest.mark.parametrize("lag_s", [0.0, 0.25])
def test_streaming_equals_whole_array(lag_s):
    # any chunking, edges arriving late against the samples, and a dropped untrusted edge
    rng = np.random.default_rng(7)
    ts, x1, te, th = sweep(1800, 7000, 3.0, {0.5: 0.2, 1.0: 1.0, 2.0: 0.3})
    x = np.stack((x1, 0.5 * x1 + 0.1, -x1), axis=1)
    valid = np.ones(len(te), bool)
    valid[700] = False
    whole = resample_to_angle(ts, x, te, th, fs=FS, valid=valid)
    r = AngleResampler(fs=FS, n_channels=3)
    cuts = _pieces(len(ts), 37, rng)
    parts = []
    prev_s = prev_e = 0
    for c in list(cuts) + [len(ts)]:
        e = int(np.searchsorted(te, ts[c - 1] - lag_s)) if c < len(ts) else len(te)
        e = max(e, prev_e)
        parts.append(r.push(ts[prev_s:c], x[prev_s:c], te[prev_e:e], th[prev_e:e], valid[prev_e:e]))
        prev_s, prev_e = c, e
    parts.append(r.finish())
    idx = np.concatenate([p.index for p in parts])
    assert np.array_equal(idx, whole.index)
    assert np.array_equal(np.concatenate([p.x for p in parts]), whole.x)
    assert np.array_equal(np.concatenate([p.t for p in parts]), whole.t)
    # the untrusted edge leaves a hole in the grid: no point is made up across it
    gaps = np.flatnonzero(np.diff(whole.index) != 1)
    assert len(gaps) == 1


def test_order_map_streaming_equals_whole_and_bounded():
    ts, x, te, th = sweep(2000, 6000, 4.0, {1.0: 1.0, 2.0: 0.5})
    s = resample_to_angle(ts, x, te, th, fs=FS)
    whole = order_map(s, rpm_band=250.0, rpm_range=(1500.0, 6500.0))
    m = OrderMap(rpm_band=250.0, rpm_range=(1500.0, 6500.0))
    for a, b in zip(range(0, len(s), 999), range(999, len(s) + 999, 999)):
        m.push(AngleSamples(s.index[a:b], s.t[a:b], s.x[a:b]))
        assert len(m._idx) <= m.n_block  # only the block in progress is held
    got = m.finish()
    assert np.array_equal(got.blocks, whole.blocks)
    assert np.allclose(got.amplitude, whole.amplitude, equal_nan=True, rtol=0, atol=0)


def twin(pin2: float, name: str) -> Engine:
    return Engine(name=name, stroke_cycle=4, pin_deg=(0.0, pin2), bank_deg=(0.0, 0.0),
                  position_m=(-0.04, 0.04), firing_order=(1, 2))


def test_compare_orders_flags_half_order_of_a_weak_cylinder():
    # a 360° twin fires every 360°: torque orders 1, 2, ... and balance orders 1, 2
    # (tests/reference balance table; firing intervals 360/360). Half-order content is unexpected.
    eng = twin(0.0, "twin-360")
    pred = predicted_orders(eng)
    assert sorted({p["order"] for p in pred}) == [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]
    spr = 64
    theta = 2 * np.pi * np.arange(spr * 8 * 4) / spr
    x = 1.0 * np.cos(theta) + 0.4 * np.cos(2 * theta) + 0.25 * np.cos(0.5 * theta)
    o, a = order_spectrum(x, samples_per_rev=spr, revs_per_block=8)
    res = compare_orders(o, a, pred)
    by_order = {p["order"]: p["measured"] for p in res["predicted"]}
    assert by_order[1.0] == pytest.approx(1.0, rel=1e-6)
    assert by_order[2.0] == pytest.approx(0.4, rel=1e-6)
    assert [u["order"] for u in res["unpredicted"]] == [0.5]
    assert res["unpredicted"][0]["amplitude"] == pytest.approx(0.25, rel=1e-6)
    assert [d["order"] for d in res["dominant"]] == [1.0, 2.0, 0.5]


def test_bad_inputs_say_what_was_expected():
    with pytest.raises(InputError, match="samples_per_rev"):
        AngleResampler(fs=FS, samples_per_rev=7)
    r = AngleResampler(fs=FS, n_channels=3)
    with pytest.raises(InputError, match=r"shape \(4, 3\)"):
        r.push(np.arange(4.0), np.zeros((4, 2)), [], [])
    with pytest.raises(InputError, match="at least one block"):
        order_spectrum(np.zeros(100), samples_per_rev=64, revs_per_block=2)
    with pytest.raises(InputError, match="window"):
        order_spectrum(np.zeros(1000), samples_per_rev=64, revs_per_block=2, window="kaiser")


def test_rephased_crank_jump_is_not_bridged():
    # the crank stage may correct its 720° phase by adding 360° from some edge on: no grid point
    # may be made up inside that step; the points after it carry the new numbering (+64 points
    # of 360/64 degrees) and the same values
    ts, x, te, th = sweep(3000, 3000, 2.0, {1.0: 1.0})
    jump = th.copy()
    jump[400:] += 360.0
    s = resample_to_angle(ts, x, te, jump, fs=FS, samples_per_rev=64)
    ref = resample_to_angle(ts, x, te, th, fs=FS, samples_per_rev=64)
    # away from the step by more than the order-domain FIR reaches (about 11 teeth here)
    early_s, early_r = s.t < te[380], ref.t < te[380]
    assert np.array_equal(s.index[early_s], ref.index[early_r])
    assert np.array_equal(s.x[early_s], ref.x[early_r])
    assert not np.any((s.t > te[399]) & (s.t < te[400]))
    late_s, late_r = s.t > te[420], ref.t > te[420]
    assert np.array_equal(s.index[late_s], ref.index[late_r] + 64)
    assert np.allclose(s.x[late_s], ref.x[late_r], atol=1e-9)


def test_several_holes_in_one_push_keep_samples_and_grid_together():
    # Lost CAN frames leave untrusted edges; one push may carry several such holes. Each grid
    # point must keep its own sample (index, time and value rows stay aligned) and no point is
    # made up across a hole.
    ts, x1, te, th = sweep(3000, 3000.001, 3.0, {1.0: 1.0})
    x = np.stack((x1, x1, x1), axis=1)
    valid = np.ones(len(te), bool)
    for k in (900, 1500, 2100, 2700):
        valid[k] = False
    out = resample_to_angle(ts, x, te, th, fs=FS, valid=valid)
    assert len(out.index) == len(out.t) == len(out.x)
    assert len(np.flatnonzero(np.diff(out.index) != 1)) == 4
    # the grid values are the signal itself: cos θ at each grid angle (order 1, amplitude 1;
    # the resampler's default grid is 64 points per revolution)
    theta = np.deg2rad(out.index * 360.0 / 64)
    np.testing.assert_allclose(out.x[:, 0], np.cos(theta), atol=0.02)
