"""Slider-crank kinematics against the handbook formulas and against finite differences.

Reference: the exact slider-crank relations, e.g. Heywood, *Internal Combustion Engine
Fundamentals* (1988), ch. 2 (displacement s = a cos θ + sqrt(l² − a² sin² θ) measured from the
crank axis; equation numbers from memory), and the two-term series a ≈ rω²(cos θ + λ cos 2θ)
(Taylor, *The Internal Combustion Engine in Theory and Practice*, vol. 2, from memory).
"""

import numpy as np
import pytest

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import (
    equivalent_inertia,
    piston_acceleration,
    piston_position,
    piston_velocity,
    reciprocating_torque,
)
from crankbeat.errors import InputError

R, L = 0.031, 0.124  # m: the Larch's crank radius (62 mm stroke / 2) and con-rod (docs/rig.md)


def heywood_distance_from_crank_axis(theta_rad, r, l):
    # s_axis = r cos θ + sqrt(l² − r² sin² θ): pin-to-crank-axis distance (Heywood ch. 2)
    return r * np.cos(theta_rad) + np.sqrt(l**2 - (r * np.sin(theta_rad)) ** 2)


def test_position_matches_handbook_form():
    theta = np.linspace(0.0, 720.0, 1441)
    s_ours = piston_position(theta, r=R, l=L)
    s_ref = (R + L) - heywood_distance_from_crank_axis(np.deg2rad(theta), R, L)
    np.testing.assert_allclose(s_ours, s_ref, atol=1e-12)


def test_position_limits():
    # TDC at 0 and BDC at 180 travel the full stroke 2r (definition of stroke)
    assert piston_position(0.0, r=R, l=L) == pytest.approx(0.0, abs=1e-15)
    assert piston_position(180.0, r=R, l=L) == pytest.approx(2 * R, rel=1e-12)


def test_velocity_and_acceleration_against_finite_differences():
    omega = 2 * np.pi * 6000 / 60  # rad/s
    dt = 1e-7
    t = np.linspace(0.0, 0.02, 4001)
    theta_deg = np.rad2deg(omega * t)
    pos = lambda tt: piston_position(np.rad2deg(omega * tt), r=R, l=L)  # noqa: E731
    v_fd = (pos(t + dt) - pos(t - dt)) / (2 * dt)
    a_fd = (pos(t + dt) - 2 * pos(t) + pos(t - dt)) / dt**2
    v = piston_velocity(theta_deg, omega, r=R, l=L)
    a = piston_acceleration(theta_deg, omega, r=R, l=L)
    # central differences: error O(dt²·s''') for v, and round-off ~ eps·s/dt² for a
    np.testing.assert_allclose(v, v_fd, atol=1e-6 * np.abs(v).max())
    np.testing.assert_allclose(a, a_fd, atol=2e-4 * np.abs(a).max())


def test_mean_piston_speed_is_twice_stroke_times_revs():
    # mean piston speed S_p = 2 L N (Heywood ch. 2): |v| averaged over a revolution
    n_rps = 100.0
    theta = np.linspace(0.0, 360.0, 200001)[:-1]
    v = piston_velocity(theta, 2 * np.pi * n_rps, r=R, l=L)
    assert np.mean(np.abs(v)) == pytest.approx(2 * (2 * R) * n_rps, rel=1e-6)


def test_acceleration_tends_to_two_term_series_for_long_rods():
    omega = 500.0
    theta = np.linspace(0.0, 360.0, 721)
    l_long = 50 * R
    lam = R / l_long
    a = piston_acceleration(theta, omega, r=R, l=l_long)
    series = R * omega**2 * (np.cos(np.deg2rad(theta)) + lam * np.cos(2 * np.deg2rad(theta)))
    # the neglected terms are O(λ³) relative (the λ³ cos 4θ term of the series, from memory)
    np.testing.assert_allclose(a, series, atol=2 * lam**3 * R * omega**2)


def _m1_engine():
    return Engine("twin-270", 4, (0.0, 270.0), (0.0, 0.0), (-0.04, 0.04), (1, 2))


def test_reciprocating_torque_does_no_net_work_and_equals_minus_half_dj():
    engine = _m1_engine()
    omega = 2 * np.pi * 8000 / 60
    theta = np.linspace(0.0, 360.0, 14401)[:-1]
    torque = reciprocating_torque(theta, omega, engine)
    J, dJ = equivalent_inertia(theta, engine, derivative=True)
    # energy conservation at constant speed: T = -(1/2) ω² dJ/dθ, and zero net work per revolution
    np.testing.assert_allclose(torque, -0.5 * omega**2 * dJ, atol=1e-9 * np.abs(torque).max())
    assert abs(torque.mean()) < 1e-9 * np.abs(torque).max()
    # the reciprocating masses only ever add to the rotating inertia
    assert J.min() >= engine.inertia_kgm2


def test_bad_geometry_is_rejected_with_values():
    with pytest.raises(InputError, match="r=0.2"):
        piston_position(0.0, r=0.2, l=0.1)
