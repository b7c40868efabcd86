"""VibrationAnalyzer against the weighting tables, the balance table and simulated rides."""

from __future__ import annotations

import numpy as np
import pytest

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import predicted_orders
from crankbeat.dsp.orders import compare_orders
from crankbeat.dsp.vibration import SensorSpec, VibrationAnalyzer, merge_spans
from crankbeat.dsp.weighting import G_N
from crankbeat.errors import InputError

FS = 2000.0
ENGINE = Engine(name="twin-270", stroke_cycle=4, pin_deg=(0.0, 270.0), bank_deg=(0.0, 0.0),
                position_m=(-0.04, 0.04), firing_order=(1, 2))


def steady_crank(rpm: float, seconds: float):
    """Edges of a 60-2 wheel (6° pitch, two missing: common practice) at constant speed."""
    k = np.arange(int(rpm * seconds))  # 6 deg per tooth position, rpm*6 deg/s
    k = k[(k % 60) < 58]
    th = 6.0 * k
    return th / (rpm * 6.0), th


def run(va, t, x, te, th, *, name="bar", chunk_s=None, crank_lag_s=0.0):
    """Push in chunks of ``chunk_s`` (None: all at once); the crank may arrive late."""
    ok = np.ones(len(te), bool)
    if chunk_s is None:
        va.push({name: (t, x)}, (te, th, ok))
        return va.finish()
    cuts = np.arange(t[0], t[-1] + chunk_s, chunk_s)
    ci = np.searchsorted(t, cuts)
    ce = np.searchsorted(te, cuts - crank_lag_s)
    for i0, i1, e0, e1 in zip(ci[:-1], ci[1:], ce[:-1], ce[1:]):
        va.push({name: (t[i0:i1], x[i0:i1])}, (te[e0:e1], th[e0:e1], ok[e0:e1]))
    va.push({name: (t[ci[-1]:], x[ci[-1]:])}, (te[ce[-1]:], th[ce[-1]:], ok[ce[-1]:]))
    return va.finish()


def row(summary, table, axis, lo=None):
    rows = getattr(summary, table)
    sel = rows["axis"] == axis
    if lo is not None:
        sel &= rows["rpm_lo"] == lo
    assert sel.sum() == 1
    return rows[sel][0]


def test_bar_sine_gives_the_wh_factor():
    # r.m.s. of A sin(2π f t) weighted = A |Wh(f)| / √2; Wh(31.5 Hz) = 0.519 (ISO 5349-1:2001
    # Table A.2), 1 g = 9.80665 m/s² (conventional value). Gravity on "up" must not count.
    seconds, rpm, amp_g = 12.0, 4200.0, 0.5
    te, th = steady_crank(rpm, seconds)
    t = np.arange(int(seconds * FS)) / FS
    x = np.zeros((len(t), 3))
    x[:, 0] = amp_g * np.sin(2 * np.pi * 31.5 * t)
    x[:, 2] = 1.0
    va = VibrationAnalyzer(ENGINE, [SensorSpec("bar", "bar", ("forward", "left", "up"), FS)],
                           riding_hours=2.0)
    s = run(va, t, x, te, th)
    r = row(s, "bands", "x", lo=4000.0)
    assert r["weighting"] == "Wh"
    assert r["rms"] == pytest.approx(amp_g * G_N * 0.519 / np.sqrt(2), rel=0.01)
    assert r["rms_unweighted"] == pytest.approx(amp_g * G_N / np.sqrt(2), rel=0.01)
    assert row(s, "bands", "z", lo=4000.0)["rms"] < 1e-3  # gravity is DC: weighted out
    total = row(s, "totals", "sum")
    assert total["samples"] == len(t)
    # ISO 5349-1: A(8) = a_hv sqrt(T / 8 h) with a_hv the root-sum-of-squares of the axes
    assert s.exposure["bar"] == pytest.approx(total["rms"] * np.sqrt(2.0 / 8.0), rel=1e-12)
    assert s.exposure["bar"] == pytest.approx(amp_g * G_N * 0.519 / np.sqrt(2) / 2, rel=0.02)


def test_seat_uses_wk_vertical_wd_horizontal_and_the_k_factors():
    # ISO 2631-1:1997 Table 3: Wk(6.3 Hz) = 1.054, Wd(2 Hz) = 0.890 (x 1000 in the table);
    # vector sum with k = 1.4 horizontal, 1 vertical (ISO 2631-1, seated, health)
    seconds, rpm = 20.0, 3000.0
    te, th = steady_crank(rpm, seconds)
    t = np.arange(int(seconds * FS)) / FS
    x = np.zeros((len(t), 3))
    x[:, 0] = 0.2 * np.sin(2 * np.pi * 2.0 * t)  # forward
    x[:, 2] = 1.0 + 0.3 * np.sin(2 * np.pi * 6.3 * t)  # up
    va = VibrationAnalyzer(ENGINE, [SensorSpec("seat", "seat", ("forward", "left", "up"), FS)])
    s = run(va, t, x, te, th, name="seat")
    rx, rz = row(s, "bands", "x", lo=3000.0), row(s, "bands", "z", lo=3000.0)
    assert (rx["weighting"], rz["weighting"]) == ("Wd", "Wk")
    assert rx["rms"] == pytest.approx(0.2 * G_N * 0.890 / np.sqrt(2), rel=0.02)
    assert rz["rms"] == pytest.approx(0.3 * G_N * 1.054 / np.sqrt(2), rel=0.02)
    rs = row(s, "bands", "sum", lo=3000.0)
    assert rs["rms"] == pytest.approx(np.hypot(1.4 * rx["rms"], rz["rms"]), rel=0.01)
    assert rs["weighting"] == "Wd+Wk"


def test_streaming_and_late_crank_give_the_same_summary():
    seconds, rpm = 10.0, 4800.0
    te, th = steady_crank(rpm, seconds)
    t = np.arange(int(seconds * FS)) / FS
    rng = np.random.default_rng(2)
    theta = np.deg2rad(rpm * 6.0 * t)
    x = np.stack((0.4 * np.cos(theta), 0.2 * np.cos(2 * theta), 1 + 0.05 * np.cos(0.5 * theta)),
                 axis=1) + 0.02 * rng.standard_normal((len(t), 3))
    spec = [SensorSpec("bar", "bar", ("forward", "left", "up"), FS)]
    whole = run(VibrationAnalyzer(ENGINE, spec), t, x, te, th)
    parts = run(VibrationAnalyzer(ENGINE, spec), t, x, te, th, chunk_s=0.37, crank_lag_s=0.2)
    # the same samples in the same bands; sums of squares accumulated chunk by chunk agree to
    # rounding (1e-12), every other stage bit for bit
    for rw, rp in zip(whole.rows(), parts.rows(), strict=True):
        same = ("sensor", "axis", "direction", "weighting", "samples", "seconds")
        assert [rw[k] for k in same] == [rp[k] for k in same]
        assert np.array_equal([rw["rpm_lo"], rw["rpm_hi"]], [rp["rpm_lo"], rp["rpm_hi"]],
                              equal_nan=True)
        assert rw["rms"] == pytest.approx(rp["rms"], rel=1e-12)
        assert rw["rms_unweighted"] == pytest.approx(rp["rms_unweighted"], rel=1e-12)
    assert np.array_equal(whole.order_amplitude["bar"], parts.order_amplitude["bar"],
                          equal_nan=True)
    assert np.array_equal(whole.order_blocks["bar"], parts.order_blocks["bar"])
    # the order map sees the pure orders of the analytic signal (m/s²)
    band = int(np.flatnonzero(whole.order_blocks["bar"])[0])
    amp = whole.order_amplitude["bar"][band]
    o = whole.orders
    assert amp[0, o == 1.0][0] == pytest.approx(0.4 * G_N, rel=0.02)
    assert amp[1, o == 2.0][0] == pytest.approx(0.2 * G_N, rel=0.02)
    assert amp[2, o == 0.5][0] == pytest.approx(0.05 * G_N, rel=0.05)


def test_bad_input():
    spec = [SensorSpec("bar", "bar", ("forward", "left", "up"), FS)]
    va = VibrationAnalyzer(ENGINE, spec)
    with pytest.raises(InputError, match="unknown sensor 'seat'"):
        va.push({"seat": (np.zeros(2), np.zeros((2, 3)))}, ([], [], []))
    with pytest.raises(InputError, match=r"xyz must be \(2, 3\)"):
        va.push({"bar": (np.zeros(2), np.zeros((2, 2)))}, ([], [], []))
    with pytest.raises(InputError, match="axes"):
        SensorSpec("bar", "bar", ("forward", "sideways", "up"), FS)
    assert merge_spans([(3.0, 4.0), (0.0, 1.0), (0.5, 2.0)]) == [(0.0, 2.0), (3.0, 4.0)]


# -- simulated rides (logger.sim) -------------------------------------------------------------

sim = pytest.importorskip("crankbeat.logger.sim.ride")


def simulated(layout: str, *, faults=(), rough: float = 0.0, road_noise_g: float = 0.02):
    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.sim.scenario import EngineSpec, Physics, Scenario, Segment

    rig = load_rig("larch")
    segs = (Segment(duration=6.0, gear=3, rpm=(3000.0, 6000.0), throttle=(30.0, 40.0)),)
    if rough:
        segs = (Segment(duration=10.0, gear=3, rpm=(4000.0, 4000.0), throttle=(30.0, 30.0)),
                Segment(duration=5.0, gear=3, rpm=(4000.0, 4000.0), throttle=(30.0, 30.0),
                        rough=rough),
                Segment(duration=5.0, gear=3, rpm=(4000.0, 4000.0), throttle=(30.0, 30.0)))
    sc = Scenario(segments=segs, seed=5, engine=EngineSpec(true_layout=layout),
                  physics=Physics(road_noise_g=road_noise_g), faults=tuple(faults))
    ride = sim.simulate(rig, sc)
    specs = [SensorSpec.of(s) for s in rig.sensors]
    va = VibrationAnalyzer(ride.engine, specs)
    name = specs[0].name
    a = ride.accel[name]
    va.push({name: (a.t, a.xyz)},
            (ride.tooth_time, ride.tooth_angle, np.ones(len(ride.tooth_time), bool)))
    s = va.finish()
    amp, blocks = s.order_amplitude[name], s.order_blocks[name]
    used = blocks > 0
    mean = np.sqrt(np.sum(amp[used] ** 2 * blocks[used, None, None], axis=0) / blocks[used].sum())
    vec = np.sqrt(np.sum(mean**2, axis=0))  # root-sum-square of the three axes
    return ride, s, compare_orders(s.orders, vec, predicted_orders(ride.engine))


@pytest.fixture(scope="module")
def twins():
    return {lay: simulated(lay) for lay in ("twin-360", "twin-180", "twin-270")}


def test_simulated_twins_show_the_predicted_orders(twins):
    # Balance of two-cylinder layouts (tests/reference; Heywood, Taylor; from memory, checked
    # numerically): 360° twin primary force 2·m·r·ω²; 180° twin no primary force (couple
    # only);
    # 270° twin √2·m·r·ω². Firing 360/360 gives whole orders only; 180/540 and 270/450 add
    # half orders (torque_orders). Every clear line measured must be a predicted one.
    for lay, (_, _, res) in twins.items():
        assert res["unpredicted"] == [], lay
        assert res["dominant"], lay
    top = {lay: res["dominant"][0]["order"] for lay, (_, _, res) in twins.items()}
    assert top["twin-360"] == 1.0 and top["twin-270"] == 1.0
    o180 = [d["order"] for d in twins["twin-180"][2]["dominant"][:2]]
    assert sorted(o180) == [1.0, 2.0]  # couple and secondary force, no primary force

    def measured(lay, order):
        return next(p["measured"] for p in twins[lay][2]["predicted"] if p["order"] == order)

    # the bar sees mostly the shaking force: order-1 ratio 360/270 ≈ 2/√2
    assert measured("twin-360", 1.0) / measured("twin-270", 1.0) == pytest.approx(
        np.sqrt(2), rel=0.1)
    assert measured("twin-180", 1.0) < 0.3 * measured("twin-270", 1.0)
    # half orders: present in the uneven-firing twins, predicted there
    half_180 = [d["order"] for d in twins["twin-180"][2]["dominant"]]
    half_270 = [d["order"] for d in twins["twin-270"][2]["dominant"]]
    assert 1.5 in half_180 and 1.5 in half_270


def test_misfiring_cylinder_shows_unpredicted_half_orders():
    # a 360° twin whose cylinder 2 never fires fires every 720°: half orders appear that the
    # layout does not predict (torque_orders of 360/360 has whole orders only)
    from crankbeat.logger.sim.scenario import Fault

    _, _, res = simulated("twin-360", faults=(Fault(kind="misfire", cylinder=2),))
    assert [u["order"] for u in res["unpredicted"]][:1] == [1.5]


def test_simulated_rough_section_is_found():
    ride, s, _ = simulated("twin-270", rough=1.0, road_noise_g=0.08)
    t0 = ride.start_time
    spans = s.rough_spans_all
    assert len(spans) == 1
    a, b = spans[0][0] - t0, spans[0][1] - t0
    assert 9.0 <= a <= 10.5 and 14.5 <= b <= 16.0  # the rough segment is 10-15 s


def test_samples_arriving_after_their_crank_edges_still_get_an_rpm():
    # Serial samples reach the pipeline a second or two after the crank edges of the same time
    # (the clock fit looks ahead): every sample of a steady ride must still land in its band.
    seconds, rpm, late_s, chunk_s = 12.0, 4200.0, 2.0, 0.2
    te, th = steady_crank(rpm, seconds)
    ok = np.ones(len(te), bool)
    t = np.arange(int(seconds * FS)) / FS
    x = np.zeros((len(t), 3))
    x[:, 2] = 1.0
    va = VibrationAnalyzer(ENGINE, [SensorSpec("bar", "bar", ("forward", "left", "up"), FS)])
    for c in np.arange(0.0, seconds + late_s + chunk_s, chunk_s):
        e = (te >= c) & (te < c + chunk_s)
        s = (t >= c - late_s) & (t < c - late_s + chunk_s)
        va.push({"bar": (t[s], x[s])}, (te[e], th[e], ok[e]))
    band = row(va.finish(), "bands", "sum", lo=4000.0)
    assert band["samples"] >= 0.999 * len(t)
