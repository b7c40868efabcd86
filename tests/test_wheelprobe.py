"""Tooth count, gap and cam phase read from tooth periods alone (dsp/wheelprobe.py).

Check values: the missing-tooth wheels of the trade, 60-2 and 36-1 (common practice), laid out
here tooth by tooth; a gap period spans missing + 1 tooth pitches (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

from crankbeat.dsp.tdcfit import tdc_from_motoring
from crankbeat.dsp.wheelprobe import cam_from_revolutions, edge_levels, wheel_from_periods
from crankbeat.errors import InputError


def wheel_periods(teeth: int, missing: int, revs: int, *, rpm0=1500.0, rpm1=6000.0,
                  ripple=0.03, seed=0) -> np.ndarray:
    """Periods of a missing-tooth wheel while the engine speeds up with a firing ripple."""
    rng = np.random.default_rng(seed)
    pitch = 360.0 / teeth
    # one revolution's tooth positions: the gap spans missing + 1 pitches
    spans = np.full(teeth - missing, pitch)
    spans[0] = (missing + 1) * pitch
    angle_steps = np.tile(spans, revs)
    angle = np.cumsum(angle_steps)
    rpm = np.linspace(rpm0, rpm1, len(angle)) * (1 + ripple * np.sin(np.deg2rad(2 * angle)))
    rpm *= 1 + 0.002 * rng.standard_normal(len(angle))
    return angle_steps / (6.0 * rpm)


@pytest.mark.parametrize("teeth, missing", [(60, 2), (36, 1), (36, 2), (24, 1)])
def test_tooth_count_and_gap_from_periods(teeth, missing):
    seen = wheel_from_periods(wheel_periods(teeth, missing, 40))
    assert (seen.teeth, seen.missing) == (teeth, missing)
    assert seen.gap_ratio == pytest.approx(missing + 1, rel=0.1)
    assert seen.agreeing == 1.0 and seen.revolutions >= 38


def test_lost_frames_and_saturation_do_not_count_a_revolution():
    p = wheel_periods(60, 2, 30)
    breaks = np.zeros(len(p), bool)
    breaks[500] = True  # frames lost here: the revolution around it has fewer periods
    p = np.delete(p, np.arange(500, 520))
    breaks = np.delete(breaks, np.arange(501, 521))
    p[1000] = np.nan
    seen = wheel_from_periods(p, breaks=breaks)
    assert (seen.teeth, seen.missing) == (60, 2)
    assert seen.agreeing == 1.0  # the broken revolutions were left out, not miscounted


def test_too_little_data_and_bad_input():
    assert wheel_from_periods(wheel_periods(60, 2, 1)) is None
    with pytest.raises(InputError, match="breaks must have shape"):
        wheel_from_periods(np.ones(100), breaks=np.zeros(3, bool))
    with pytest.raises(InputError, match="min_gap_ratio"):
        wheel_from_periods(np.ones(100), min_gap_ratio=1.0)


def test_cam_window_alternates_and_its_level_in_the_tdc_revolution():
    L, revs = 58, 10
    rev = np.repeat(np.arange(revs), L)
    tooth = np.tile(np.arange(L), revs)
    holds = rev % 2 == 1  # cylinder 1's firing TDC in the odd revolutions
    level = np.where(holds, 0, 1)  # an active-low window
    cam = cam_from_revolutions(rev, tooth, level, holds)
    assert cam.pattern == "alternating" and cam.level_in_tdc_revolution == 0
    assert cam.switch_tooth == 0 and cam.revolutions == revs
    stuck = cam_from_revolutions(rev, tooth, np.ones_like(rev), holds)
    assert stuck.pattern == "constant" and stuck.level_in_tdc_revolution is None
    none = cam_from_revolutions(rev, tooth, np.full_like(rev, -1))
    assert none.pattern == "absent"


def test_edge_levels_take_the_frame_that_brought_the_edge():
    frame_t = np.array([1.0, 2.0, 3.0])
    lv = edge_levels([0.5, 1.0, 1.5, 2.9, 3.5], frame_t, [0, 1, 0])
    np.testing.assert_array_equal(lv, [0, 0, 1, 0, 0])


def test_tdc_fit_checks_its_input():
    from crankbeat.dsp.crank import CrankAngles, ToothWheel
    from crankbeat.logger.rig import load_layout

    angles = CrankAngles.empty()
    with pytest.raises(InputError, match="no_firing must have shape"):
        tdc_from_motoring(angles, np.ones(3, bool), ToothWheel(), load_layout("twin-270"))
    assert tdc_from_motoring(angles, np.zeros(0, bool), ToothWheel(),
                             load_layout("twin-270")) is None
