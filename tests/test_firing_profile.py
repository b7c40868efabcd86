"""Firing intervals and layout families from the averaged cycle, on simulated rides.

Check values: the true firing angles the simulator fires at, and the common-practice intervals
of the layouts (270/450 for a 270 deg twin, 180 x 4 for a flat-plane four, REFERENCES.md);
layouts with one interval pattern fire alike (common practice: a 360 deg twin and a boxer twin
both fire every 360 deg; a 270 deg twin and a 90 deg V-twin both fire 270/450).
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest

from crankbeat.dsp.crank import ToothWheel, reconstruct_crank
from crankbeat.dsp.firing_check import NOT_JUDGED_NOTE, FiringCheck
from crankbeat.dsp.firing_profile import CycleProfile, layout_verdict, profile_intervals
from crankbeat.errors import InputError

sim = pytest.importorskip("crankbeat.logger.sim")
rig_mod = pytest.importorskip("crankbeat.logger.rig")
from test_analysis import ride_frames  # noqa: E402

from crankbeat.logger.pipeline import layout_candidates  # noqa: E402

Seg = sim.Segment
PULL = (Seg(duration=2.0, gear=3, rpm=(3000, 3000), throttle=(30, 30)),
        Seg(duration=2.0, gear=3, rpm=(3000, 7000), throttle=(50, 50)))


def rig_with_wheel(preset, teeth=60, missing=2, tdc=96.0):
    base = rig_mod.load_rig(preset)
    return dataclasses.replace(base, wheel=dataclasses.replace(
        base.wheel, teeth=teeth, missing=missing, tdc_offset_deg=tdc))


def crank_of(rig, segments=PULL, *, seed=1, error_rms=0.0, true_layout=None, faults=(),
             physics=None):
    scn = sim.Scenario(segments=segments, seed=seed, faults=faults,
                       wheel=sim.WheelSpec(error_rms_deg=error_rms),
                       engine=sim.EngineSpec(true_layout=true_layout),
                       physics=physics or sim.Physics())
    ride = sim.simulate(rig, scn)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the four has no cam: phase warnings
        crank = reconstruct_crank(*ride_frames(ride), ToothWheel.like(rig.wheel), rig.engine)
    return ride, crank


def profile_of(rig, crank, pieces=7):
    prof = CycleProfile(rig.engine.cycle_deg, rig.wheel.pitch_deg)
    for part in np.array_split(np.arange(len(crank.t)), pieces):  # streamed in pushes
        prof.push(type("Edges", (), dict(t=crank.t[part], angle=crank.angle[part],
                                         valid=crank.valid[part]))())
    return prof


def intervals(rig, crank):
    prof = profile_of(rig, crank)
    grid, tq = prof.torque(rig.engine)
    return [r.observed_deg for r in profile_intervals(grid, tq, rig.engine)]


# before (event centres, 60-2/36-1@60/36-1@95/24-1/12-1): 269.43 270.80 269.36 268.70 272.35
@pytest.mark.parametrize("teeth,missing,tdc", [(60, 2, 96.0), (36, 1, 60.0), (36, 1, 95.0),
                                               (24, 1, 73.0)])
@pytest.mark.parametrize("seed", [1, 2])
def test_perfect_wheel_intervals_within_half_a_degree(teeth, missing, tdc, seed):
    rig = rig_with_wheel("larch", teeth, missing, tdc)
    _, crank = crank_of(rig, seed=seed)
    obs = intervals(rig, crank)
    print(teeth, missing, tdc, seed, np.round(obs, 2))
    assert abs(obs[0] - 270.0) <= 0.5 and abs(obs[1] - 450.0) <= 0.5  # common practice 270/450


def test_twelve_tooth_wheel_is_within_two_degrees():
    # short of the 0.5 deg target (measured +1.7): 30 deg between edges smears the pulses
    rig = rig_with_wheel("larch", 12, 1, 50.0)
    _, crank = crank_of(rig)
    obs = intervals(rig, crank)
    assert abs(obs[0] - 270.0) <= 2.0


def test_four_intervals_and_ten_degrees_of_retard():
    rig = rig_with_wheel("alder")
    _, crank = crank_of(rig)
    assert np.allclose(intervals(rig, crank), 180.0, atol=0.5)  # flat-plane four: 4 x 180
    rig = rig_with_wheel("larch")
    _, crank = crank_of(rig, faults=(sim.Fault("retard", 2, degrees=10.0),))
    check = FiringCheck(rig.engine, rig.wheel.pitch_deg, {}, tolerance_deg=3.0)
    check.push(crank)
    rows, notes = check.interval_rows(wheel_known=True)
    print([(r["from_cyl"], r["to_cyl"], round(r["observed_deg"], 2)) for r in rows])
    assert not notes and all(r["flagged"] for r in rows)
    assert rows[0]["observed_deg"] > 273.0 and rows[1]["observed_deg"] < 447.0


def test_intervals_on_a_wheel_not_learnt_are_not_judged():
    rig = rig_with_wheel("larch")
    _, crank = crank_of(rig, error_rms=0.15)
    check = FiringCheck(rig.engine, rig.wheel.pitch_deg, {}, tolerance_deg=3.0)
    check.push(crank)
    rows, notes = check.interval_rows(wheel_known=False)
    assert notes == [NOT_JUDGED_NOTE]
    assert all(r["observed_deg"] is None and not r["flagged"] for r in rows)


@pytest.mark.parametrize("seed", [1, 2])
def test_layout_on_a_wheel_never_learnt(seed):
    rig = rig_with_wheel("larch")
    cands = layout_candidates(rig.engine)
    _, crank = crank_of(rig, seed=seed, error_rms=0.15)
    right = layout_verdict(profile_of(rig, crank), cands, rig.engine.name)
    assert right.fits_rig and right.families[0][0] == "twin-270 / vtwin-90: same firing"
    _, crank = crank_of(rig, seed=seed, error_rms=0.15, true_layout="twin-360")
    wrong = layout_verdict(profile_of(rig, crank), cands, rig.engine.name)
    assert wrong.fits_rig is False and "rig file" in wrong.note()
    assert wrong.families[0][0] == "boxer-twin / twin-360: same firing"


def test_four_wrong_layout_is_named():
    rig = rig_with_wheel("alder")
    cands = layout_candidates(rig.engine)
    _, crank = crank_of(rig, error_rms=0.15, true_layout="four-cross")
    v = layout_verdict(profile_of(rig, crank), cands, rig.engine.name)
    assert v.fits_rig is False and v.families[0][0] == "four-cross"


def test_a_torsional_mode_near_a_firing_order_does_not_contradict_a_right_rig_file():
    # A clutch and primary drive geared to the crank through a spring (mode at 265 Hz, order 2.6
    # at 6200 rpm), an inertia 0.76 of the rig file's: a physics the rig file does not describe.
    # The speed profile of the right (270 deg) engine then fits a 60 deg V-twin better by more
    # than the margin (0.69 against 0.62 when measured), but not clearly: the layout must be left
    # unjudged, not called wrong (a wrong call withholds every misfire alert of the ride).
    rig = rig_with_wheel("larch")
    phys = sim.Physics(inertia_scale=0.76, geared_inertia_kgm2=0.1287, geared_ratio=2.13,
                       geared_hz=265.5, driveline_hz=11.9, combustion_cov=0.054)
    steady = (Seg(duration=12.0, gear=4, rpm=(6200, 6200), throttle=(33, 33)),)
    _, crank = crank_of(rig, steady, error_rms=0.02, physics=phys)
    v = layout_verdict(profile_of(rig, crank), layout_candidates(rig.engine), rig.engine.name)
    print(v.families, v.margin)
    assert v.margin > 0.05  # the case: a margin-only rule would call the rig file wrong here
    assert v.fits_rig is None
    assert "not judged" in v.note() and "alerts stand" in v.note()


def test_bad_input():
    with pytest.raises(InputError):
        CycleProfile(720.0, 200.0)
    rig = rig_with_wheel("larch")
    prof = CycleProfile(720.0, 6.0)
    with pytest.raises(InputError, match="too little"):
        prof.torque(rig.engine)
    with pytest.raises(InputError):
        layout_verdict(prof, {}, "twin-270")
    with pytest.raises(InputError):
        FiringCheck(rig.engine, 6.0, {}, tolerance_deg=0.0)
