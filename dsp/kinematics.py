"""Slider-crank kinematics and the reciprocating inertia of an engine.

Exact expressions for an in-line slider-crank with crank radius ``r``, con-rod length ``l`` and
``lambda = r / l`` (see e.g. Heywood, *Internal Combustion Engine Fundamentals*, ch. 2). Angles are
degrees of crank rotation from the cylinder's own TDC; results are SI.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from crankbeat.dsp.engine import Engine
from crankbeat.errors import InputError


def _check_geometry(r: float, l: float) -> float:
    if not (r > 0 and l > r):
        raise InputError(f"slider-crank needs 0 < r < l, got r={r!r}, l={l!r}")
    return r / l


def _root(theta: np.ndarray, lam: float) -> np.ndarray:
    return np.sqrt(1.0 - (lam * np.sin(theta)) ** 2)


def piston_position(theta_deg: ArrayLike, *, r: float, l: float) -> np.ndarray:
    """Piston displacement from TDC.

    s = r (1 - cos θ) + l (1 - sqrt(1 - λ² sin² θ))

    Parameters
    ----------
    theta_deg : array_like, any shape
        Crank angle from this cylinder's TDC, degrees.
    r, l : float
        Crank radius and con-rod length, m.

    Returns
    -------
    ndarray, same shape as ``theta_deg``
        Displacement, m (0 at TDC, 2r at BDC).
    """
    lam = _check_geometry(r, l)
    th = np.deg2rad(np.asarray(theta_deg, dtype=float))
    return r * (1.0 - np.cos(th)) + l * (1.0 - _root(th, lam))


def velocity_ratio(theta_deg: ArrayLike, *, r: float, l: float) -> np.ndarray:
    """ds/dθ, the piston's displacement per radian of crank, m/rad.

    ds/dθ = r sin θ (1 + λ cos θ / sqrt(1 - λ² sin² θ)). It is also the lever arm that turns the
    gas force on the piston into crank torque (virtual work: T = F · ds/dθ).
    """
    lam = _check_geometry(r, l)
    th = np.deg2rad(np.asarray(theta_deg, dtype=float))
    return r * np.sin(th) * (1.0 + lam * np.cos(th) / _root(th, lam))


def velocity_ratio_derivative(theta_deg: ArrayLike, *, r: float, l: float) -> np.ndarray:
    """d²s/dθ², m/rad².

    d²s/dθ² = r cos θ + r λ (cos 2θ (1 - λ² sin² θ) + λ² sin² θ cos² θ) / (1 - λ² sin² θ)^(3/2)
    """
    lam = _check_geometry(r, l)
    th = np.deg2rad(np.asarray(theta_deg, dtype=float))
    root = _root(th, lam)
    sc = np.sin(th) * np.cos(th)
    return r * np.cos(th) + r * lam * (np.cos(2 * th) * root**2 + (lam * sc) ** 2) / root**3


def gas_torque_factor(theta_deg: ArrayLike, *, r: float, l: float) -> np.ndarray:
    """Lever arm from piston force to crank torque, m: T_gas = p · A_piston · gas_torque_factor."""
    return velocity_ratio(theta_deg, r=r, l=l)


def piston_velocity(theta_deg: ArrayLike, omega: ArrayLike, *, r: float, l: float) -> np.ndarray:
    """Piston velocity, m/s, for crank speed ``omega`` (rad/s, broadcast against theta)."""
    return np.asarray(omega, dtype=float) * velocity_ratio(theta_deg, r=r, l=l)


def piston_acceleration(
    theta_deg: ArrayLike, omega: ArrayLike, *, r: float, l: float, alpha: ArrayLike = 0.0
) -> np.ndarray:
    """Piston acceleration, m/s²: a = ω² d²s/dθ² + α ds/dθ (α: crank acceleration, rad/s²)."""
    omega = np.asarray(omega, dtype=float)
    return omega**2 * velocity_ratio_derivative(theta_deg, r=r, l=l) + np.asarray(
        alpha, dtype=float
    ) * velocity_ratio(theta_deg, r=r, l=l)


def cylinder_angles(theta_deg: ArrayLike, engine: Engine) -> np.ndarray:
    """Each cylinder's own angle from its TDC, degrees, shape ``theta.shape + (n_cyl,)``."""
    th = np.asarray(theta_deg, dtype=float)
    return th[..., None] - engine.tdc_deg()


def equivalent_inertia(
    theta_deg: ArrayLike, engine: Engine, *, derivative: bool = False
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Crank-equivalent inertia J(θ) = J0 + Σ_k m (ds_k/dθ)², kg·m².

    Parameters
    ----------
    theta_deg : array_like
        Engine crank angle, degrees (cylinder 1 TDC at 0).
    engine : Engine
    derivative : bool, keyword-only
        Also return dJ/dθ, kg·m²/rad.

    Returns
    -------
    J : ndarray, shape of ``theta_deg``
    dJ : ndarray, only when ``derivative``
    """
    local = cylinder_angles(theta_deg, engine)
    r, l, m = engine.crank_radius_m, engine.conrod_m, engine.recip_mass_kg
    v = velocity_ratio(local, r=r, l=l)
    J = engine.inertia_kgm2 + m * np.sum(v**2, axis=-1)
    if not derivative:
        return J
    dv = velocity_ratio_derivative(local, r=r, l=l)
    return J, 2.0 * m * np.sum(v * dv, axis=-1)


def reciprocating_torque(
    theta_deg: ArrayLike, omega: ArrayLike, engine: Engine, *, alpha: ArrayLike = 0.0
) -> np.ndarray:
    """Torque the reciprocating masses exert on the crank, N·m.

    T = -Σ_k m a_k ds_k/dθ; at constant speed this is -(1/2) ω² dJ/dθ and integrates to zero over
    a revolution.
    """
    local = cylinder_angles(theta_deg, engine)
    r, l, m = engine.crank_radius_m, engine.conrod_m, engine.recip_mass_kg
    om = np.asarray(omega, dtype=float)[..., None]
    al = np.asarray(alpha, dtype=float)[..., None]
    a = piston_acceleration(local, om, r=r, l=l, alpha=al)
    return -m * np.sum(a * velocity_ratio(local, r=r, l=l), axis=-1)
