"""Scenario files, the ride profile and the simulated wheel, against docs/rig and layout facts."""

from __future__ import annotations

import math

import numpy as np
import pytest

from crankbeat.dsp.layout import firing_intervals
from crankbeat.errors import InputError
from crankbeat.logger.rig import load_layout, load_rig
from crankbeat.logger.sim import (
    EngineSpec,
    Fault,
    Physics,
    Scenario,
    Segment,
    WheelSpec,
    load_scenario,
    scenario_from_dict,
    scenario_to_toml,
    simulate,
)
from crankbeat.logger.sim.profile import Profile

Larch = load_rig("larch")

TEXT = """
[ride]
name = "loop"
seed = 5
rig = "larch"

[[segment]]
duration = 2.0
gear = 0
rpm = [1300, 1300]
throttle = [1.0, 1.0]

[[segment]]
duration = 3.0
gear = 2
road_kmh = [40, 60]
throttle = [30, 50]
rough = 1.0

[[fault]]
kind = "misfire"
cylinder = 2
start = 2.5
end = 3.0

[[fault]]
kind = "partial_burn"
cylinder = 1
cycles = [10, 11, 12]
fraction = 0.3

[engine]
true_layout = "twin-360"

[physics]
driveline_stiffness = 12000.0
gear_ratios = [2.5, 1.8, 1.4, 1.2, 1.05, 0.95]

[wheel]
error_rms_deg = 0.1

[can]
unknown_ids = [0x3F0]
"""


def test_scenario_file_round_trip(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(TEXT)
    sc = load_scenario(p)
    assert sc.seed == 5 and sc.rig == "larch" and sc.duration == 5.0
    assert sc.segments[1].road_kmh == (40, 60) and sc.segments[1].rough == 1.0
    assert sc.faults[1].cycles == (10, 11, 12)
    assert sc.engine.true_layout == "twin-360" and sc.physics.driveline_stiffness == 12000.0
    assert sc.can.unknown_ids == (0x3F0,)
    again = tmp_path / "again.toml"
    again.write_text(scenario_to_toml(sc))
    assert load_scenario(again) == sc


@pytest.mark.parametrize(
    "doc, match",
    [
        ({"segment": [{"duration": 1, "rpm": [1, 2], "gaer": 1}]}, "unknown key 'gaer'"),
        ({"segment": []}, "no \\[\\[segment\\]\\]"),
        ({"segment": [{"duration": 1}]}, "exactly one of rpm or road_kmh"),
        ({"segment": [{"duration": -1, "rpm": [1, 1]}]}, "duration must be > 0"),
        ({"segment": [{"duration": 1, "rpm": [1, 1], "throttle": [0, 120]}]}, "0..100"),
        ({"segment": [{"duration": 1, "rpm": [1, 1]}], "fault": [{"kind": "fizz", "cylinder": 1}]},
         "fault kind"),
        ({"segment": [{"duration": 1, "rpm": [1, 1]}], "physiks": {}}, "unknown section 'physiks'"),
    ],
)
def test_bad_scenarios_give_one_line_errors(doc, match):
    with pytest.raises(InputError, match=match) as info:
        scenario_from_dict(doc, where="x.toml")
    assert "\n" not in str(info.value)


def test_bad_toml_names_the_file(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[ride\nseed = 1\n")
    with pytest.raises(InputError, match="bad.toml: not valid TOML"):
        load_scenario(p)
    with pytest.raises(InputError, match="no such scenario file"):
        load_scenario(tmp_path / "missing.toml")


def test_profile_scalar_path_equals_array_path():
    sc = load_scenario_text()
    prof = Profile(sc)
    t = np.linspace(0, sc.duration, 777)
    arr = prof.at(t)
    for i, ti in enumerate(t):
        w, rate, thr, gear, engaged, rough = prof.at_scalar(float(ti))
        assert w == pytest.approx(arr.omega_ref[i], rel=1e-12)
        assert rate == pytest.approx(arr.omega_rate[i], rel=1e-12)
        assert thr == pytest.approx(arr.throttle[i], abs=1e-12)
        assert (gear, engaged, rough) == (arr.gear[i], arr.engaged[i], arr.rough[i])


def load_scenario_text():
    import tomllib

    return scenario_from_dict(tomllib.loads(TEXT))


def test_road_speed_segment_reaches_its_target():
    sc = load_scenario_text()
    ride = simulate(Larch, Scenario(segments=sc.segments, seed=1))
    t = ride.status_t - ride.start_time
    v = ride.status["road_speed"][(t > 4.0) & (t < 4.9)]
    target = 40 + 20 * (np.array([4.45]) - 2.0) / 3.0
    assert np.mean(v) == pytest.approx(target[0], rel=0.05)


def _steady(rpm=3000, **kw):
    return Scenario(segments=(Segment(1.5, gear=0, rpm=(rpm, rpm), throttle=(4, 4)),), seed=3, **kw)


def test_wheel_edges_and_cam_window_follow_rig_md():
    # docs/rig.md: 60-2 wheel, tooth 0 first after the gap, cylinder 1 TDC 96° after tooth 0's edge
    # (= tooth 16's edge, 16 × 6°); cylinder 2 fires 270° later (= tooth 1 of the next
    # revolution, 366°); cam level 1 during the revolution holding cylinder 1's firing TDC.
    ride = simulate(Larch, _steady())
    t, tooth, cam = ride.tooth_time, ride.tooth_number, ride.tooth_cam
    assert tooth.max() == 57 and np.all(np.diff(tooth)[tooth[1:] != 0] == 1)
    ev = ride.events
    for e in ev[ev["cylinder"] == 1][:5]:
        i = int(np.argmin(np.abs(t - e["t"])))
        assert tooth[i] == 16 and abs(t[i] - e["t"]) < 1e-9 and cam[i] == 1
    for e in ev[ev["cylinder"] == 2][:5]:
        i = int(np.argmin(np.abs(t - e["t"])))
        assert tooth[i] == 1 and abs(t[i] - e["t"]) < 1e-9 and cam[i] == 0
    rev_start = np.flatnonzero(tooth == 0)
    for a, b in zip(rev_start[:-1], rev_start[1:]):
        assert len(set(cam[a:b].tolist())) == 1
    assert set(cam[rev_start].tolist()) == {0, 1}
    assert np.all(np.diff(cam[rev_start]) != 0)  # alternates revolution by revolution


def test_wheel_errors_are_seeded_and_move_the_edges():
    a = simulate(Larch, _steady(wheel=WheelSpec(error_rms_deg=0.1)))
    b = simulate(Larch, _steady(wheel=WheelSpec(error_rms_deg=0.1)))
    assert np.array_equal(a.tooth_error_deg, b.tooth_error_deg)
    # 58 draws of N(0, 0.1°): the sample std has a relative standard error 1/√(2·57) ≈ 9 %,
    # so ±35 % is about 3.7 standard errors (χ² statistics)
    assert a.tooth_error_deg.std() == pytest.approx(0.1, rel=0.35)
    assert abs(a.tooth_error_deg.sum()) < 1e-9
    expect = -96.0 + 6.0 * a.tooth_number + a.tooth_error_deg[a.tooth_number]
    assert np.allclose(np.mod(a.tooth_angle - expect + 180.0, 360.0) - 180.0, 0.0, atol=1e-9)


@pytest.mark.parametrize("layout", ["twin-360", "twin-180", "twin-270", "vtwin-90"])
def test_true_layout_sets_the_firing_intervals(layout):
    # Intervals of the common layouts (common practice): 360/360, 180/540, 270/450, and
    # a 90° V-twin like a 270° twin; taken here from the truth's TDC times at steady speed.
    sc = _steady(rpm=2400, engine=EngineSpec(true_layout=layout))
    ride = simulate(Larch, sc)
    ev = ride.events
    th = np.radians(ride.tooth_angle)
    ang = np.degrees(np.interp(ev["t"], ride.tooth_time, th))
    gaps = np.round(np.diff(ang), 6)[:4]
    expect = firing_intervals(load_layout(layout))
    assert sorted(set(gaps.tolist())) == sorted(set(np.round(expect, 6).tolist()))
    assert ride.engine.name == layout


def test_inertia_scale_reduces_the_speed_fluctuation():
    # Speed fluctuation of a flywheel is ΔE / (J ω²) (handbook coefficient of fluctuation).
    base = simulate(Larch, _steady(rpm=2000))
    heavy = simulate(Larch, _steady(rpm=2000, physics=Physics(inertia_scale=2.0)))

    def fluct(r):
        sel = r.tooth_time - r.start_time > 0.5
        return np.ptp(r.tooth_omega[sel]) / np.mean(r.tooth_omega[sel])

    ratio = fluct(base) / fluct(heavy)
    j0 = Larch.engine.inertia_kgm2
    jr = (2 * j0 + 0.0005) / (j0 + 0.0005)  # plus the reciprocating share, ~m·r² (from memory)
    assert ratio == pytest.approx(jr, rel=0.15)


def test_faults_by_explicit_cycles_and_probability():
    sc = Scenario(segments=(Segment(2.0, gear=0, rpm=(3000, 3000), throttle=(5, 5)),), seed=8,
                  faults=(Fault("misfire", 1, cycles=(5, 9)), Fault("misfire", 2, probability=0.3)))
    ev = simulate(Larch, sc).events
    m1 = ev[(ev["cylinder"] == 1) & ~ev["fired"]]
    assert m1["cycle"].tolist() == [5, 9]
    share = np.mean(~ev["fired"][ev["cylinder"] == 2])
    n = int((ev["cylinder"] == 2).sum())
    assert abs(share - 0.3) < 4 * math.sqrt(0.3 * 0.7 / n)  # binomial, 4 sigma
