"""The simulator's knobs that make a ride differ from its rig file, each against physics."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import bilinear, freqz, welch

from crankbeat.errors import InputError
from crankbeat.logger.rig import load_rig
from crankbeat.logger.sim import (
    CanSpec,
    EngineSpec,
    Fault,
    Physics,
    Scenario,
    Segment,
    WheelSpec,
    build_frames,
    driveline,
    geared,
    scenario_from_dict,
    scenario_to_toml,
    simulate,
)
from crankbeat.logger.sim.canframes import teeth_frames

Larch = load_rig("larch")


def _steady(rpm=5000.0, seconds=2.0, gear=0, throttle=8.0, **kw) -> Scenario:
    seg = Segment(seconds, gear=gear, rpm=(rpm, rpm), throttle=(throttle, throttle))
    return Scenario(segments=(seg,), seed=3, **kw)


def _cycle_fluctuation(ride) -> float:
    """Median over working cycles of (max − min) / mean crank speed within the cycle."""
    cyc = np.floor(ride.tooth_angle / 720.0).astype(int)
    sel = ride.tooth_time - ride.start_time > 0.5
    vals = []
    for k in np.unique(cyc[sel])[1:-1]:
        om = ride.tooth_omega[sel & (cyc == k)]
        vals.append(np.ptp(om) / np.mean(om))
    return float(np.median(vals))


def test_stiff_geared_part_adds_its_referred_inertia():
    # Coefficient of speed fluctuation = ΔE / (J ω²) (handbook flywheel formula): a geared part
    # of J_s / ratio² = J_crank, stiffly joined, halves it; the rig file's J is unchanged.
    base = simulate(Larch, _steady())
    j_e = base.effective_inertia_kgm2
    phys = Physics(geared_inertia_kgm2=j_e * 1.9**2, geared_ratio=1.9, geared_hz=2000.0)
    heavy = simulate(Larch, _steady(physics=phys))
    assert heavy.effective_inertia_kgm2 == pytest.approx(2 * j_e, rel=1e-9)
    assert heavy.engine.inertia_kgm2 == Larch.engine.inertia_kgm2
    ratio = _cycle_fluctuation(base) / _cycle_fluctuation(heavy)
    assert ratio == pytest.approx(2.0, rel=0.03)


def test_geared_mode_sits_where_the_two_inertia_formula_puts_it():
    # Two-mass torsional system: f = sqrt(k (J1 + J2) / (J1 J2)) / 2π (handbook, from memory).
    phys = Physics(geared_inertia_kgm2=0.06, geared_ratio=2.0, geared_hz=170.0,
                   geared_damping=0.02)
    j1, j2 = 0.0214, 0.06 / 2.0**2
    k = geared.referred_stiffness(phys, j1)
    f_formula = math.sqrt(k * (j1 + j2) / (j1 * j2)) / (2 * math.pi)
    assert f_formula == pytest.approx(170.0, rel=1e-9)
    b, a = bilinear(*geared.transfer(phys, j1), fs=geared.FS)
    f, h = freqz(b, a, worN=np.linspace(50.0, 400.0, 3501), fs=geared.FS)
    assert f[np.argmax(np.abs(h))] == pytest.approx(f_formula, rel=0.02)
    # Below the mode the crank shares its motion: H(0) = -J2 / (J1 + J2).
    assert np.real(freqz(b, a, worN=[0.0], fs=geared.FS)[1][0]) == pytest.approx(
        -j2 / (j1 + j2), rel=1e-6)


def test_heavier_geared_part_lowers_the_driveline_mode():
    # The driveline mode with the geared part on the engine side: J1 = J_crank + J_g.
    sc = _steady(physics=Physics(geared_inertia_kgm2=0.08))
    j_e = 0.0214
    j_g = geared.referred_inertia(sc.physics)
    k = driveline.referred_stiffness(sc, j_e + j_g, 3)
    from crankbeat.logger.sim.crank import vehicle_inertia
    j_v = vehicle_inertia(sc, 3)
    expect = math.sqrt(k * (j_e + j_g + j_v) / ((j_e + j_g) * j_v)) / (2 * math.pi)
    assert driveline.mode_frequency(sc, j_e + j_g, 3) == pytest.approx(expect, rel=1e-9)
    assert driveline.mode_frequency(sc, j_e + j_g, 3) < driveline.mode_frequency(sc, j_e, 3)


@pytest.mark.parametrize("hz", [7.0, 18.0])
def test_driveline_hz_shows_in_the_crank_speed_on_a_rough_road(hz):
    # 6000 rpm: the slowest engine order of a 270° twin (0.5) lies at 50 Hz, above the mode.
    sc = _steady(rpm=6000, seconds=6.0, gear=3, throttle=25,
                 physics=Physics(driveline_hz=hz, rough_gain=3.0))
    sc = sc.with_changes(segments=(Segment(6.0, gear=3, rpm=(6000, 6000), throttle=(25, 25),
                                           rough=2.0),))
    ride = simulate(Larch, sc)
    fs = 1000.0
    t = np.arange(ride.tooth_time[0] + 0.5, ride.tooth_time[-1], 1 / fs)
    om = np.interp(t, ride.tooth_time, ride.tooth_omega)
    f, p = welch(om - om.mean(), fs=fs, nperseg=2048)
    band = (f > 3.0) & (f < 40.0)
    assert f[band][np.argmax(p[band])] == pytest.approx(hz, rel=0.15)


def test_tooth_errors_have_the_rms_asked():
    rms = []
    for seed in range(12):
        sc = _steady(seconds=0.3).with_changes(seed=seed, wheel=WheelSpec(error_rms_deg=0.15))
        rms.append(np.sqrt(np.mean(simulate(Larch, sc).tooth_error_deg ** 2)))
    # Sample rms of 58 zero-mean normals: within ~10 % each, ~3 % on the mean of 12.
    assert np.mean(rms) == pytest.approx(0.15, rel=0.06)


def test_no_fuel_cut_keeps_firing_on_the_overrun():
    seg = Segment(3.0, gear=3, rpm=(6000, 3000), throttle=(0, 0))
    cut = simulate(Larch, Scenario(segments=(seg,), seed=4))
    assert cut.events["fuel_cut"].mean() > 0.9
    ride = simulate(Larch, Scenario(segments=(seg,), seed=4, engine=EngineSpec(fuel_cut=False)))
    assert not ride.events["fuel_cut"].any()
    assert ride.events["fired"].all()


@pytest.mark.parametrize("start", [0.0, 1.5])
def test_dead_cylinder_has_no_combustion_for_its_span(start):
    sc = _steady(seconds=5.0, faults=(Fault("misfire", 2, start=start, end=start + 3.0),))
    ev = simulate(Larch, sc).events
    t = ev["t"] - sc.start_time
    inside = (ev["cylinder"] == 2) & (t >= start) & (t < start + 3.0)
    assert inside.sum() > 100
    assert not ev["fired"][inside].any() and (ev["burn_fraction"][inside] == 0).all()
    assert ev["fired"][~inside].all()


def test_can_jitter_is_half_normal_on_top_of_the_latency():
    sc = _steady(seconds=1.0, can=CanSpec(latency_s=0.0005, jitter_s=0.0002))
    ride = simulate(Larch, sc)
    frames = build_frames(ride)
    sent = np.sort(teeth_frames(ride)[0])
    got = frames.t[frames.kind == 0]
    extra = got - sent - 0.0005
    # Mean of |N(0, σ²)| is σ sqrt(2/π) (half-normal distribution).
    assert np.mean(extra) == pytest.approx(0.0002 * math.sqrt(2 / math.pi), rel=0.1)


def test_new_keys_round_trip_and_bad_values_are_one_line_errors():
    sc = _steady(physics=Physics(driveline_hz=12.0, geared_inertia_kgm2=0.05, geared_hz=220.0),
                 engine=EngineSpec(fuel_cut=False))
    import tomllib
    back = scenario_from_dict(tomllib.loads(scenario_to_toml(sc)))
    assert back == sc
    with pytest.raises(InputError, match="geared_hz"):
        Physics(geared_hz=0.0)
    with pytest.raises(InputError, match="geared_inertia_kgm2"):
        Physics(geared_inertia_kgm2=-1.0)


def test_edge_times_and_speeds_stay_consistent_with_a_geared_part_and_a_driveline_mode():
    # Kinematics: the angle between two edges is the integral of the speed over their time
    # step; the trapezoid of the two edge speeds must give it to well under 1 % (rms).
    phys = Physics(geared_inertia_kgm2=0.08, geared_hz=150.0, driveline_hz=8.0)
    sc = Scenario(segments=(Segment(2.0, gear=3, rpm=(3000, 6000), throttle=(30, 30)),),
                  seed=3, physics=phys)
    ride = simulate(Larch, sc)
    step = np.radians(np.diff(ride.tooth_angle)) / np.diff(ride.tooth_time)
    trap = 0.5 * (ride.tooth_omega[1:] + ride.tooth_omega[:-1])
    assert np.sqrt(np.mean(((trap - step) / step) ** 2)) < 0.002
