"""Observed firing intervals and layout identification on simulated rides.

Expected intervals are those of the layouts (common practice: 270/450 for a 270° twin; a 90° V-twin
on one pin fires (360 + 90)/(360 − 90) = 450/270, tests/reference/README.md; 360/360; 180/540).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from crankbeat.dsp.crank import ToothWheel, reconstruct_crank
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import FIRED, empty_events
from crankbeat.dsp.intervals import identify_layout, interval_check
from crankbeat.errors import InputError, LayoutMismatchWarning

sim = pytest.importorskip("crankbeat.logger.sim")
rig_mod = pytest.importorskip("crankbeat.logger.rig")
from test_analysis import ride_frames, run_ride  # noqa: E402

Seg = sim.Segment
TWINS = ("twin-360", "twin-180", "twin-270", "vtwin-90")


def _steady(rpm, thr, duration=3.0, gear=3):
    return (Seg(duration=duration, gear=gear, rpm=(rpm, rpm), throttle=(thr, thr)),)


@pytest.mark.parametrize("rpm", [3000, 5000, 7000])
def test_m1_intervals_within_3_degrees(rpm):
    rig = rig_mod.load_rig("larch")
    _, step, _ = run_ride(sim.Scenario(segments=_steady(rpm, 40), seed=5))
    res = interval_check(step.events, rig.engine, tolerance_deg=3.0)
    assert [(r.from_cylinder, r.to_cylinder, r.expected_deg) for r in res] == [
        (1, 2, 270.0), (2, 1, 450.0)]  # common practice for a 270° twin
    for r in res:
        print(f"{rpm} rpm {r.from_cylinder}->{r.to_cylinder}: {r.observed_deg:.2f} "
              f"± {r.uncertainty_deg:.2f} deg (n={r.n})")
        assert abs(r.observed_deg - r.expected_deg) <= 3.0
        assert r.n > 50 and r.uncertainty_deg < 0.55 and not r.flagged  # measured 0.51 at 7000


@pytest.mark.parametrize("rpm,thr", [(3000, 30), (4500, 40), (6000, 60)])
def test_ten_degrees_of_retard_is_flagged(rpm, thr):
    rig = rig_mod.load_rig("larch")
    scn = sim.Scenario(segments=_steady(rpm, thr), faults=(sim.Fault("retard", 2, degrees=10.0),),
                       seed=5)
    _, step, _ = run_ride(scn)
    res = interval_check(step.events, rig.engine, tolerance_deg=3.0)
    print([(r.from_cylinder, r.to_cylinder, round(r.observed_deg, 2)) for r in res])
    # cylinder 2 fires late: 1->2 grows, 2->1 shrinks by the same amount
    assert res[0].flagged and res[0].observed_deg > 273.0
    assert res[1].flagged and res[1].observed_deg < 447.0


@pytest.fixture(scope="module")
def candidates():
    rig = rig_mod.load_rig("larch")
    geo = {k: getattr(rig.engine, k) for k in
           ("bore_m", "stroke_m", "conrod_m", "recip_mass_kg", "inertia_kgm2")}
    return {n: rig_mod.load_layout(n).with_geometry(**geo) for n in TWINS}


def _crank_of(true_layout, rpm=5000, thr=40):
    rig = rig_mod.load_rig("larch")
    scn = sim.Scenario(segments=_steady(rpm, thr), seed=6,
                       engine=sim.EngineSpec(true_layout=true_layout))
    ride = sim.simulate(rig, scn)
    ft, per, cam, lost = ride_frames(ride)
    return reconstruct_crank(ft, per, cam, lost, ToothWheel.like(rig.wheel), rig.engine)


@pytest.mark.parametrize("true", TWINS)
def test_true_layout_is_identified(true, candidates):
    crank = _crank_of(true)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ranked = identify_layout(crank, candidates, expected=true)
    print(true, [(n, round(s, 3)) for n, s in ranked])
    assert ranked[0][0] == true
    assert ranked[0][1] > ranked[1][1] + 0.2
    assert not [w for w in caught if issubclass(w.category, LayoutMismatchWarning)]


def test_rig_mismatch_is_warned(candidates):
    # the rig file says 270°, the engine is a 360° twin (scenario true_layout)
    crank = _crank_of("twin-360")
    with pytest.warns(LayoutMismatchWarning, match="twin-360"):
        ranked = identify_layout(crank, candidates, expected="twin-270")
    assert ranked[0][0] == "twin-360"


# --- on hand-made events ----------------------------------------------------------------------

TWIN = Engine("twin-270", 4, (0.0, 270.0), (0.0, 0.0), (-0.04, 0.04), (1, 2))


def _events(iv_12, iv_21, n=200, scatter=2.0, seed=0):
    rng = np.random.default_rng(seed)
    ev = empty_events(n)
    ev["cylinder"] = np.tile([1, 2], n // 2)
    ev["verdict"] = FIRED
    ev["rpm"] = 4000.0
    base = np.where(ev["cylinder"] == 2, iv_12, iv_21)
    ev["interval_deg"] = base + scatter * rng.standard_normal(n)
    return ev


def test_interval_check_mean_and_uncertainty():
    res = interval_check(_events(275.0, 445.0), TWIN, tolerance_deg=3.0)
    assert res[0].observed_deg == pytest.approx(275.0, abs=0.6)
    # standard error of the mean of 100 values of sd 2: 0.2 (textbook)
    assert res[0].uncertainty_deg == pytest.approx(0.2, rel=0.25)
    assert res[0].flagged and res[1].flagged
    ok = interval_check(_events(271.0, 449.0), TWIN, tolerance_deg=3.0)
    assert not ok[0].flagged and not ok[1].flagged


def test_layout_scores_from_events(candidates):
    ranked = identify_layout(_events(270.0, 450.0), candidates)
    assert ranked[0][0] in ("twin-270",)


def test_bad_arguments():
    with pytest.raises(InputError, match="tolerance"):
        interval_check(_events(270, 450), TWIN, tolerance_deg=0)
    with pytest.raises(InputError, match="expected layout"):
        identify_layout(_events(270, 450), {"a": TWIN}, expected="b")


def test_analyzer_profile_warns_of_a_mismatch_while_streaming(candidates):
    from crankbeat.dsp.analysis import EventAnalyzer

    rig = rig_mod.load_rig("larch")
    scn = sim.Scenario(segments=_steady(5000, 40), seed=6,
                       engine=sim.EngineSpec(true_layout="twin-360"))
    ride = sim.simulate(rig, scn)
    ft, per, cam, lost = ride_frames(ride)
    an = EventAnalyzer(rig.engine, ToothWheel.like(rig.wheel))
    for i in range(0, ft.size, 500):
        an.push(ft[i:i + 500], per[i:i + 500], cam[i:i + 500], lost[i:i + 500])
    an.finish()
    with pytest.warns(LayoutMismatchWarning):
        ranked = identify_layout(an.profile, candidates, expected="twin-270")
    assert ranked[0][0] == "twin-360"
