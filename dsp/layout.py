"""Firing pattern and reciprocating balance of an engine layout.

Conventions are those of :mod:`dsp.engine`: crank angle in degrees, cylinder 1's firing TDC at 0.

Firing angles rule
------------------
A 4-stroke cylinder reaches TDC twice per cycle, at ``t_k = pin_k + bank_k`` and ``t_k + 360``;
which of the two is its firing TDC is the valve timing's choice, not the crank's. Unless the engine
gives ``firing_deg`` explicitly, :func:`firing_angles` takes the choice that (1) fires the
cylinders in ``firing_order`` and (2) spreads the firings most evenly (the largest interval is
smallest; ties go to the lexicographically smallest angles). This reproduces the usual patterns of
the common layouts (360/360, 180/540, 270/450, V-twins (360+γ)/(360−γ), triples, fours).
A 2-stroke fires at every TDC: ``t_k`` mod 360.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import cylinder_angles, velocity_ratio_derivative
from crankbeat.errors import InputError

_ANGLE_EPS = 1e-6


def firing_angles(engine: Engine) -> np.ndarray:
    """Firing TDC of each cylinder within the cycle, degrees, shape (n_cyl,), cylinder 1 at 0.

    See the module docstring for the rule. Raises :class:`InputError` when no choice of TDCs fires
    the cylinders in ``engine.firing_order``.
    """
    if engine.firing_deg is not None:
        angles = np.mod(np.asarray(engine.firing_deg, dtype=float), engine.cycle_deg)
        return np.mod(angles - angles[0], engine.cycle_deg)
    tdc = np.mod(engine.tdc_deg() - engine.tdc_deg()[0], 360.0)
    if engine.stroke_cycle == 2:
        _check_order(tdc, engine)
        return tdc
    best: tuple[float, tuple[float, ...]] | None = None
    for shifts in itertools.product((0.0, 360.0), repeat=engine.n_cylinders - 1):
        angles = tdc + np.concatenate(([0.0], shifts))
        if not _fires_in_order(angles, engine.firing_order):
            continue
        key = (float(np.max(_cyclic_intervals(np.sort(angles), 720.0))), tuple(np.round(angles, 9)))
        if best is None or key < best:
            best = key
    if best is None:
        raise InputError(
            f"engine {engine.name!r}: no choice of firing TDCs fires the cylinders in the order "
            f"{list(engine.firing_order)} (TDC angles {np.round(tdc, 3).tolist()} deg)"
        )
    return np.asarray(best[1], dtype=float)


def _fires_in_order(angles: np.ndarray, order: tuple[int, ...]) -> bool:
    ordered = np.argsort(angles, kind="stable")
    sorted_angles = angles[ordered]
    if np.any(np.diff(sorted_angles) < _ANGLE_EPS):
        return False  # two cylinders firing at once is not a firing order
    return tuple(int(i) + 1 for i in ordered) == tuple(order)


def _check_order(angles: np.ndarray, engine: Engine) -> None:
    if not _fires_in_order(angles, engine.firing_order):
        raise InputError(
            f"engine {engine.name!r}: TDC angles {np.round(angles, 3).tolist()} deg do not fire in "
            f"the order {list(engine.firing_order)}"
        )


def _cyclic_intervals(sorted_angles: np.ndarray, cycle: float) -> np.ndarray:
    return np.diff(np.concatenate((sorted_angles, [sorted_angles[0] + cycle])))


def firing_sequence(engine: Engine) -> tuple[np.ndarray, np.ndarray]:
    """Cylinders in firing order starting with cylinder 1, and their firing angles (degrees)."""
    angles = firing_angles(engine)
    order = np.argsort(angles, kind="stable")
    return order + 1, angles[order]


def firing_intervals(engine: Engine) -> np.ndarray:
    """Crank angle from each firing to the next, in firing order from cylinder 1, degrees.

    Shape (n_cyl,); the intervals sum to the cycle (720° for a 4-stroke, 360° for a 2-stroke).
    """
    _, angles = firing_sequence(engine)
    return _cyclic_intervals(angles, engine.cycle_deg)


def interval_after(engine: Engine) -> dict[int, float]:
    """For each cylinder, the crank angle from its firing to the next firing (degrees)."""
    cyls, _ = firing_sequence(engine)
    return {int(c): float(i) for c, i in zip(cyls, firing_intervals(engine))}


def layout_signature(engine: Engine) -> tuple[float, ...]:
    """The cyclic interval pattern in its canonical rotation (lexicographically smallest).

    Two layouts with the same signature cannot be told apart from firing intervals alone.
    """
    iv = np.round(firing_intervals(engine), 6)
    rotations = [tuple(np.roll(iv, -k).tolist()) for k in range(len(iv))]
    return min(rotations)


# --- reciprocating balance -----------------------------------------------------------------------

Model = Literal["exact", "second-order", "primary", "secondary"]


def _piston_accel_per_omega2(local_deg: np.ndarray, engine: Engine, model: Model) -> np.ndarray:
    r, lam = engine.crank_radius_m, engine.rod_ratio
    th = np.deg2rad(local_deg)
    if model == "exact":
        return velocity_ratio_derivative(local_deg, r=r, l=engine.conrod_m)
    if model == "second-order":
        return r * (np.cos(th) + lam * np.cos(2 * th))
    if model == "primary":
        return r * np.cos(th)
    if model == "secondary":
        return r * lam * np.cos(2 * th)
    raise InputError(f"model must be exact, second-order, primary or secondary, got {model!r}")


def _axis_vectors(engine: Engine) -> np.ndarray:
    beta = np.deg2rad(np.asarray(engine.bank_deg, dtype=float))
    return np.stack((np.cos(beta), np.sin(beta)), axis=-1)  # (n_cyl, 2)


def shaking_forces(
    engine: Engine, theta_deg: ArrayLike, omega: ArrayLike = 1.0, *, model: Model = "exact"
) -> np.ndarray:
    """Net inertia force of the reciprocating masses on the engine structure, N.

    The force is the sum over cylinders of ``m · a_k`` along each cylinder's axis (the reaction the
    block feels as the pistons are accelerated; positive a_k points from the crank towards the
    cylinder head). Constant speed is assumed.

    Parameters
    ----------
    engine : Engine
    theta_deg : array_like, shape (...)
        Engine crank angle, degrees.
    omega : array_like, broadcast against ``theta_deg``
        Crank speed, rad/s.
    model : {"exact", "second-order", "primary", "secondary"}, keyword-only
        Exact slider-crank, its two-term series, or one term of it.

    Returns
    -------
    ndarray, shape (..., 2)
        Components along cylinder 1's axis ([..., 0]) and across it, 90° ahead in the direction of
        rotation ([..., 1]), in the plane perpendicular to the crank.
    """
    local = cylinder_angles(theta_deg, engine)
    acc = _piston_accel_per_omega2(local, engine, model) * engine.recip_mass_kg
    om2 = np.asarray(omega, dtype=float) ** 2
    per_cyl = acc[..., :, None] * _axis_vectors(engine)  # (..., n_cyl, 2)
    return np.sum(per_cyl, axis=-2) * np.asarray(om2)[..., None]


def shaking_couples(
    engine: Engine, theta_deg: ArrayLike, omega: ArrayLike = 1.0, *, model: Model = "exact"
) -> np.ndarray:
    """Rocking moment of the reciprocating inertia forces about the crank's midpoint, N·m.

    Returns shape (..., 2): the moment of the force components along cylinder 1's axis ([..., 0],
    i.e. the "pitching" couple in the plane of the crank and cylinder 1's axis) and of the
    components across it ([..., 1], the "yawing" couple), each Σ_k position_k · F_k.
    """
    local = cylinder_angles(theta_deg, engine)
    acc = _piston_accel_per_omega2(local, engine, model) * engine.recip_mass_kg
    om2 = np.asarray(omega, dtype=float) ** 2
    lever = np.asarray(engine.position_m, dtype=float)
    per_cyl = (acc * lever)[..., :, None] * _axis_vectors(engine)
    return np.sum(per_cyl, axis=-2) * np.asarray(om2)[..., None]


@dataclass(frozen=True)
class BalanceTerm:
    """One harmonic of the shaking force or couple, per unit ω² (divide out rad²/s²).

    The harmonic traces an ellipse in the plane perpendicular to the crank: ``magnitude`` is its
    major semi-axis (the largest value the component reaches), ``minor`` its minor semi-axis;
    ``rotating`` is True when the two are equal (a constant-magnitude rotating vector, which a
    counterweight can cancel for the primary). ``direction_deg`` is the major axis's direction
    from cylinder 1's axis, ``phase_deg`` the crank angle (of this order) at which it peaks.
    """

    order: int
    kind: Literal["force", "couple"]
    magnitude: float  # N/(rad/s)² or N·m/(rad/s)²
    minor: float
    rotating: bool
    direction_deg: float
    phase_deg: float


def _harmonic_ellipse(series: np.ndarray, theta: np.ndarray, order: int) -> tuple[float, ...]:
    n = len(theta)
    phasor = np.exp(-1j * order * theta)
    c = 2.0 / n * (series * phasor[:, None]).sum(axis=0)  # (2,) complex
    a_vec, b_vec = c.real, -c.imag  # component(θ) = a cos(oθ) + b sin(oθ)
    u, s, vt = np.linalg.svd(np.stack((a_vec, b_vec), axis=1))
    major, minor = float(s[0]), float(s[1])
    direction = float(np.rad2deg(np.arctan2(u[1, 0], u[0, 0])))
    phase = float(np.rad2deg(np.arctan2(vt[0, 1], vt[0, 0])) / order)
    if direction <= -90.0 or direction > 90.0:  # an axis, not an arrow
        direction = direction - 180.0 if direction > 90.0 else direction + 180.0
    return major, minor, direction, phase


def balance_table(
    engine: Engine, *, orders: tuple[int, ...] = (1, 2), model: Model = "second-order",
    rel_tol: float = 1e-9,
) -> list[BalanceTerm]:
    """Primary and secondary shaking forces and couples by harmonic projection.

    Works for any layout: the force and couple series over one revolution are projected on each
    crank order. Terms smaller than ``rel_tol`` × (m r) are reported with magnitude 0.

    Returns
    -------
    list of BalanceTerm, force then couple for each order.
    """
    theta_deg = np.arange(0.0, 360.0, 0.25)
    theta = np.deg2rad(theta_deg)
    forces = shaking_forces(engine, theta_deg, 1.0, model=model)
    couples = shaking_couples(engine, theta_deg, 1.0, model=model)
    floor = rel_tol * engine.recip_mass_kg * engine.crank_radius_m
    out: list[BalanceTerm] = []
    for order in orders:
        for kind, series in (("force", forces), ("couple", couples)):
            major, minor, direction, phase = _harmonic_ellipse(series, theta, order)
            if major < floor:  # no such harmonic: its direction and phase mean nothing
                major = minor = direction = phase = 0.0
            minor = minor if minor >= floor else 0.0
            out.append(
                BalanceTerm(
                    order=order,
                    kind=kind,  # type: ignore[arg-type]
                    magnitude=major,
                    minor=minor,
                    rotating=bool(major > 0 and minor > 0.999 * major),
                    direction_deg=direction,
                    phase_deg=phase,
                )
            )
    return out


def torque_orders(engine: Engine, *, max_order: float = 6.0) -> list[tuple[float, float]]:
    """Engine orders excited by the firing impulses, with their relative strength 0..1.

    The gas torque of identical firings is a train of equal pulses at the firing angles; its
    Fourier series over the cycle has the coefficient |Σ_k exp(-i o φ_k)| / n at order o (orders
    per crank revolution: halves for a 4-stroke). Even firing leaves only multiples of the firing
    frequency; uneven layouts add the half orders.
    """
    phi = np.deg2rad(firing_angles(engine))
    step = 360.0 / engine.cycle_deg
    orders = np.arange(step, max_order + 1e-9, step)
    rel = np.abs(np.exp(-1j * orders[:, None] * phi[None, :]).sum(axis=1)) / engine.n_cylinders
    return [(float(o), float(r)) for o, r in zip(orders, rel) if r > 1e-9]


def predicted_orders(
    engine: Engine, *, omega: float = 1.0, rel_threshold: float = 1e-6, max_order: float = 6.0
) -> list[dict[str, float | str]]:
    """Orders the layout is expected to show in the vibration, strongest first.

    Each entry: ``order`` (per crank revolution), ``source`` ("force", "couple" or "torque") and
    ``magnitude`` (N or N·m at ``omega`` for force and couple; relative 0..1 for torque).
    """
    out: list[dict[str, float | str]] = []
    scale = engine.recip_mass_kg * engine.crank_radius_m
    for term in balance_table(engine):
        if term.magnitude > rel_threshold * scale:
            out.append(
                {"order": float(term.order), "source": term.kind,
                 "magnitude": term.magnitude * omega**2}
            )
    for order, rel in torque_orders(engine, max_order=max_order):
        if rel > rel_threshold:
            out.append({"order": order, "source": "torque", "magnitude": rel})
    return out
