"""Firing intervals and reciprocating balance of common layouts.

Interval patterns are common practice (tests/reference/README.md): a 360° twin 360/360, a 180° twin
180/540, a 270° twin 270/450, a V-twin of vee γ on one pin (360+γ)/(360−γ), an inline triple
240×3, a flat-plane four 180×4, a cross-plane four 90/180/270/180, a 2-stroke 180° twin 180/180.
Balance figures: tests/reference table, "textbook results, e.g. Heywood and Taylor vol. 2, from
memory, checked numerically"; the triple's √3 couples are common practice.
"""

import numpy as np
import pytest

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.layout import (
    balance_table,
    firing_angles,
    firing_intervals,
    layout_signature,
    shaking_forces,
    torque_orders,
)
from crankbeat.errors import InputError

M, R, CONROD, PITCH = 0.42, 0.031, 0.124, 0.08  # kg, m, m, m (Larch figures; pitch invented)
LAM = R / CONROD


def engine(pins, banks=None, order=None, stroke_cycle=4, name="test"):
    n = len(pins)
    banks = banks or (0.0,) * n
    order = order or tuple(range(1, n + 1))
    pos = tuple(np.linspace(-PITCH / 2 * (n - 1), PITCH / 2 * (n - 1), n))
    return Engine(name, stroke_cycle, tuple(pins), tuple(banks), pos, tuple(order),
                  stroke_m=2 * R, conrod_m=CONROD, recip_mass_kg=M)


LAYOUTS = {
    # name: (engine, interval signature as a cyclic pattern) — common practice
    "twin-360": (engine((0, 0)), (360, 360)),
    "twin-180": (engine((0, 180)), (180, 540)),
    "twin-270": (engine((0, 270)), (270, 450)),
    "vtwin-90": (engine((0, 0), (0, 90)), (270, 450)),  # = 270° twin, tests/reference/README.md
    "vtwin-60": (engine((0, 0), (0, 60)), (300, 420)),  # (360-γ)/(360+γ), γ=60
    "boxer-twin": (engine((0, 180), (0, 180)), (360, 360)),
    "twin-180-2stroke": (engine((0, 180), stroke_cycle=2), (180, 180)),
    "triple-240": (engine((0, 240, 120)), (240, 240, 240)),
    "four-flat": (engine((0, 180, 180, 0), order=(1, 3, 4, 2)), (180, 180, 180, 180)),
    "four-cross": (engine((0, 270, 90, 180), order=(1, 3, 2, 4)), (90, 180, 270, 180)),
    "single": (engine((0,)), (720,)),
    "single-2stroke": (engine((0,), stroke_cycle=2), (360,)),
}


@pytest.mark.parametrize("name", sorted(LAYOUTS))
def test_interval_pattern_of_common_layouts(name):
    eng, pattern = LAYOUTS[name]
    iv = firing_intervals(eng)
    assert iv.sum() == pytest.approx(eng.cycle_deg)
    rotations = {tuple(np.roll(pattern, k)) for k in range(len(pattern))}
    assert tuple(np.round(iv, 6)) in rotations


def test_270_twin_fires_cylinder_2_270_after_cylinder_1():
    # docs/rig.md: cylinder 2 fires 270° after cylinder 1, cylinder 1 again 450° later
    np.testing.assert_allclose(firing_angles(LAYOUTS["twin-270"][0]), [0.0, 270.0])
    np.testing.assert_allclose(firing_intervals(LAYOUTS["twin-270"][0]), [270.0, 450.0])


def test_vtwin_fires_360_plus_vee_after_front_cylinder():
    # tests/reference/README.md: a V-twin of vee γ on one pin fires at (360 + γ)/(360 − γ)
    np.testing.assert_allclose(firing_intervals(LAYOUTS["vtwin-90"][0]), [450.0, 270.0])


def test_signature_tells_twins_apart_but_not_270_from_vtwin_90():
    names = ("twin-360", "twin-180", "twin-270", "vtwin-90")
    sig = {n: layout_signature(LAYOUTS[n][0]) for n in names}
    assert len({sig["twin-360"], sig["twin-180"], sig["twin-270"]}) == 3
    assert sig["twin-270"] == sig["vtwin-90"]


def test_explicit_firing_angles_win():
    eng = engine((0, 180)).with_geometry(firing_deg=(0.0, 540.0))
    np.testing.assert_allclose(firing_intervals(eng), [540.0, 180.0])


def test_impossible_firing_order_is_an_input_error():
    # three cylinders on one pin have two TDC slots per cycle (0 and 360): two would fire at once
    eng = engine((0, 0, 0))
    with pytest.raises(InputError, match="firing"):
        firing_angles(eng)


def _terms(eng):
    return {(t.order, t.kind): t for t in balance_table(eng)}


def test_balance_360_twin():
    t = _terms(LAYOUTS["twin-360"][0])
    assert t[1, "force"].magnitude == pytest.approx(2 * M * R)
    assert t[1, "couple"].magnitude == pytest.approx(0.0, abs=1e-12)
    assert t[2, "force"].magnitude == pytest.approx(2 * LAM * M * R)
    assert t[2, "couple"].magnitude == pytest.approx(0.0, abs=1e-12)


def test_balance_180_twin():
    t = _terms(LAYOUTS["twin-180"][0])
    assert t[1, "force"].magnitude == pytest.approx(0.0, abs=1e-12)  # primary forces cancel
    assert t[1, "couple"].magnitude == pytest.approx(M * R * PITCH)  # a primary couple remains
    assert t[2, "force"].magnitude == pytest.approx(2 * LAM * M * R)  # secondary forces add
    assert t[2, "couple"].magnitude == pytest.approx(0.0, abs=1e-12)


def test_balance_270_twin():
    # tests/reference gives √2·m·r·ω² for the primary force: we find it is a one-plane (inline)
    # oscillating force of that amplitude, peaking 45° after cylinder 1's TDC.
    t = _terms(LAYOUTS["twin-270"][0])
    assert t[1, "force"].magnitude == pytest.approx(np.sqrt(2) * M * R)
    assert not t[1, "force"].rotating
    assert t[1, "couple"].magnitude == pytest.approx(np.sqrt(2) / 2 * M * R * PITCH)
    assert t[2, "force"].magnitude == pytest.approx(0.0, abs=1e-12)
    assert t[2, "couple"].magnitude == pytest.approx(LAM * M * R * PITCH)


def test_balance_90_vtwin():
    t = _terms(LAYOUTS["vtwin-90"][0])
    assert t[1, "force"].magnitude == pytest.approx(M * R)  # constant, rotating
    assert t[1, "force"].rotating
    assert t[2, "force"].magnitude == pytest.approx(np.sqrt(2) * LAM * M * R)  # one plane
    assert t[2, "force"].minor == pytest.approx(0.0, abs=1e-12)
    assert abs(t[2, "force"].direction_deg) == pytest.approx(45.0)  # across the vee


def test_balance_flat_four_and_triple():
    four = _terms(LAYOUTS["four-flat"][0])
    assert four[1, "force"].magnitude == pytest.approx(0.0, abs=1e-12)
    assert four[2, "force"].magnitude == pytest.approx(4 * LAM * M * R)
    tri = _terms(LAYOUTS["triple-240"][0])
    assert tri[1, "force"].magnitude == pytest.approx(0.0, abs=1e-12)
    assert tri[2, "force"].magnitude == pytest.approx(0.0, abs=1e-12)
    assert tri[1, "couple"].magnitude == pytest.approx(np.sqrt(3) * M * R * PITCH)
    assert tri[2, "couple"].magnitude == pytest.approx(np.sqrt(3) * LAM * M * R * PITCH)


def test_exact_forces_contain_the_two_term_series():
    eng = LAYOUTS["twin-360"][0]
    theta = np.linspace(0, 360, 721)
    exact = shaking_forces(eng, theta, 1.0, model="exact")
    series = shaking_forces(eng, theta, 1.0, model="second-order")
    # the series drops O(λ³) terms (about λ³/4 relative for the 4th order, from memory)
    np.testing.assert_allclose(exact, series, atol=LAM**3 * 2 * M * R)


def test_torque_orders_even_and_uneven():
    # even firing: only multiples of the firing frequency (n/2 orders for a 4-stroke n-cylinder)
    orders = dict(torque_orders(LAYOUTS["four-flat"][0], max_order=4))
    assert set(orders) == {2.0, 4.0}
    # the 270 twin's uneven firing puts energy in the half orders (common practice)
    orders = dict(torque_orders(LAYOUTS["twin-270"][0], max_order=2))
    assert orders[0.5] == pytest.approx(abs(np.cos(np.deg2rad(67.5))))


def test_presets_load_if_present():
    rig = pytest.importorskip("crankbeat.logger.rig")
    if not hasattr(rig, "load_layout"):
        pytest.skip("crankbeat.logger.rig.load_layout not there yet")
    for name, (eng, _pattern) in LAYOUTS.items():
        if name in ("vtwin-60", "single-2stroke"):
            continue
        preset = rig.load_layout(name)
        assert layout_signature(preset) == layout_signature(eng), name
