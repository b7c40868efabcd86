"""Engine geometry: the one description of a crank layout that every dsp stage takes.

Angle conventions (used throughout crankbeat)
---------------------------------------------
* Crank angle ``theta`` is in degrees of crank rotation, positive in the direction of rotation,
  zero at cylinder 1's top dead centre (TDC). For a 4-stroke the cycle is 720°, zero at cylinder
  1's *firing* TDC; for a 2-stroke it is 360°.
* ``pin_deg[k]`` is how far cylinder k's crank pin trails cylinder 1's pin (cylinder 1 is 0).
  ``bank_deg[k]`` is the angle of cylinder k's axis from cylinder 1's axis, measured in the
  direction of rotation (0 for inline engines, e.g. 90 for the second cylinder of a 90° V, 180 for
  the opposed cylinder of a boxer). Cylinder k is at TDC when ``theta = pin_deg[k] + bank_deg[k]``
  (mod 360).
* ``position_m[k]`` is the cylinder's position along the crank axis, for rocking couples.
* ``firing_order`` lists cylinder numbers (1-based) in the order they fire.
* ``firing_deg`` optionally fixes each cylinder's firing TDC in the cycle explicitly; when it is
  ``None`` the firing angles are derived from pins, banks and firing order (see
  :func:`dsp.layout.firing_angles`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from crankbeat.errors import InputError


@dataclass(frozen=True)
class Engine:
    """Geometry and mass data of one engine.

    Parameters
    ----------
    name : str
        Label for reports (a preset name such as ``"twin-270"`` or the rig's own).
    stroke_cycle : {2, 4}
        Strokes per working cycle.
    pin_deg, bank_deg, position_m : tuple of float, length n_cyl
        See the module docstring for the conventions. Degrees and metres.
    firing_order : tuple of int
        Cylinder numbers, 1-based, each exactly once.
    bore_m, stroke_m, conrod_m : float
        Bore, stroke and connecting-rod length (centre to centre), metres.
    recip_mass_kg : float
        Reciprocating mass per cylinder (piston, pin, rings, small end share), kg.
    inertia_kgm2 : float
        Rotating inertia at the crank (crank, flywheel, primary drive share), kg·m².
    firing_deg : tuple of float or None
        Explicit firing TDC angle of each cylinder in the cycle, degrees, or None to derive it.
    """

    name: str
    stroke_cycle: int
    pin_deg: tuple[float, ...]
    bank_deg: tuple[float, ...]
    position_m: tuple[float, ...]
    firing_order: tuple[int, ...]
    bore_m: float = 0.084
    stroke_m: float = 0.062
    conrod_m: float = 0.124
    recip_mass_kg: float = 0.42
    inertia_kgm2: float = 0.021
    firing_deg: tuple[float, ...] | None = field(default=None)

    def __post_init__(self) -> None:
        n = len(self.pin_deg)
        if self.stroke_cycle not in (2, 4):
            raise InputError(f"stroke_cycle must be 2 or 4, got {self.stroke_cycle!r}")
        if n < 1:
            raise InputError("an engine needs at least one cylinder")
        for label, seq in (("bank_deg", self.bank_deg), ("position_m", self.position_m)):
            if len(seq) != n:
                raise InputError(f"{label} has {len(seq)} entries, expected {n} (one per cylinder)")
        if sorted(self.firing_order) != list(range(1, n + 1)):
            raise InputError(
                f"firing_order {list(self.firing_order)} must name each cylinder 1..{n} "
                "exactly once"
            )
        if self.firing_deg is not None and len(self.firing_deg) != n:
            raise InputError(f"firing_deg has {len(self.firing_deg)} entries, expected {n}")
        for label in ("bore_m", "stroke_m", "conrod_m", "recip_mass_kg", "inertia_kgm2"):
            if not getattr(self, label) > 0:
                raise InputError(f"{label} must be > 0, got {getattr(self, label)!r}")
        if self.conrod_m <= self.stroke_m / 2:
            raise InputError(
                f"conrod_m {self.conrod_m} must exceed the crank radius {self.stroke_m / 2}"
            )

    @property
    def n_cylinders(self) -> int:
        return len(self.pin_deg)

    @property
    def cycle_deg(self) -> float:
        """Crank degrees per working cycle: 720 for a 4-stroke, 360 for a 2-stroke."""
        return 360.0 * self.stroke_cycle / 2

    @property
    def crank_radius_m(self) -> float:
        return self.stroke_m / 2

    @property
    def rod_ratio(self) -> float:
        """lambda = r / l, crank radius over con-rod length."""
        return self.crank_radius_m / self.conrod_m

    def with_geometry(self, **changes: object) -> "Engine":
        """A copy with some fields replaced (e.g. another bore or inertia)."""
        from dataclasses import replace

        return replace(self, **changes)  # type: ignore[arg-type]

    def tdc_deg(self) -> np.ndarray:
        """Angle of each cylinder's TDC within one crank revolution, degrees, shape (n_cyl,)."""
        return np.mod(np.asarray(self.pin_deg) + np.asarray(self.bank_deg), 360.0)
