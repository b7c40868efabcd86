"""Ride scenarios: what the simulated bike is asked to do, which faults it carries, and how.

A :class:`Scenario` is plain data, deterministic from its ``seed``. It is usually read from a
scenario file (TOML, crankbeat's own layout):

.. code-block:: toml

    [ride]
    name = "short pull"
    rig = "larch"                     # optional: the rig the scenario was written for
    seed = 11
    start_time = 1767225600.0      # s on the CAN time base at the start of the ride
    coolant_c = [62.0, 88.0]       # coolant at the start and the limit it warms towards

    [[segment]]                    # one row per stretch of riding, in order
    duration = 3.0                 # s
    gear = 0                       # 0 = neutral (clutch open)
    rpm = [1300, 1300]             # target crank speed at the start and end (or road_kmh = [a, b])
    throttle = [2.0, 2.0]          # % at the start and end
    rough = 0.0                    # rough-road intensity, 0 smooth .. 1 broken tarmac .. 3 gravel

    [[fault]]                      # any number, each with a kind
    kind = "misfire"               # misfire | partial_burn | retard
    cylinder = 2                   # 1-based
    start = 1.0                    # s from the ride start (default: whole ride)
    end = 2.0
    probability = 1.0              # chance per firing event inside the span
    # cycles = [40, 41, 57]        # or explicit working-cycle indices (misfire / partial_burn)
    # fraction = 0.4               # partial_burn: share of the charge that burns
    # a dead cylinder: kind = "misfire", probability = 1.0 over its span
    # degrees = 8.0                # retard: ignition later by this much

    [engine]
    true_layout = "twin-360"       # the bike really has this layout (the rig file says otherwise)
    fuel_cut_rpm = 1800            # overrun cut: no fuel once throttle < fuel_cut_throttle ...
    fuel_cut_throttle = 1.0        # ... with the crank faster than fuel_cut_rpm, until it opens
    fuel_cut_hysteresis_rpm = 300  # ... or the crank falls below fuel_cut_rpm minus this
    fuel_cut = false               # this ECU never cuts fuel on the overrun

    [physics]                      # variations; every key optional (see Physics for defaults)
    inertia_scale = 1.0
    driveline_stiffness = 9000.0   # N·m/rad at the rear wheel
    combustion_cov = 0.03
    driveline_hz = 12.0            # driveline mode in every gear (instead of the stiffness)
    geared_inertia_kgm2 = 0.05     # clutch basket + gearbox input at their shaft
    geared_ratio = 1.9             # crank turns per shaft turn (default: primary_ratio)
    geared_hz = 180.0              # mode of crank against the geared part

    [wheel]
    error_rms_deg = 0.05           # tooth spacing errors of the trigger wheel, rms, seeded

    [can]
    latency_s = 0.0004
    jitter_s = 0.0001
    drop_probability = 0.0
    unknown_ids = [0x3F0]
    unknown_rate_hz = 10.0

    [serial]
    drift_ppm = 30.0
    corrupt_probability = 0.0      # per frame: one byte flipped
    lost_probability = 0.0         # per frame: a run of bytes lost
    start_offset = 0               # bytes dropped at the start (stream begins mid-frame)

Every section but ``[ride]`` and ``[[segment]]`` is optional. Unknown keys are errors (a typo
must not silently leave a fault out of a test).
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Literal

from crankbeat.errors import InputError

FaultKind = Literal["misfire", "partial_burn", "retard"]


@dataclass(frozen=True)
class Segment:
    """One stretch of riding with linear ramps of its targets.

    ``rpm`` or ``road_kmh`` gives the target (start, end); in neutral only ``rpm`` makes sense.
    ``rough`` scales the road input (0 = smooth).
    """

    duration: float
    gear: int = 0
    rpm: tuple[float, float] | None = None
    road_kmh: tuple[float, float] | None = None
    throttle: tuple[float, float] = (0.0, 0.0)
    rough: float = 0.0
    label: str = ""

    def __post_init__(self) -> None:
        if not self.duration > 0:
            raise InputError(f"segment duration must be > 0 s, got {self.duration!r}")
        if (self.rpm is None) == (self.road_kmh is None):
            raise InputError(f"segment {self.label or ''!r}: give exactly one of rpm or road_kmh")
        if self.road_kmh is not None and self.gear == 0:
            raise InputError("a segment in neutral (gear 0) needs rpm, not road_kmh")
        for name in ("rpm", "road_kmh", "throttle"):
            v = getattr(self, name)
            if v is not None and len(v) != 2:
                raise InputError(f"segment {name} must be [start, end], got {v!r}")
        if not all(0.0 <= x <= 100.0 for x in self.throttle):
            raise InputError(f"segment throttle must be within 0..100 %, got {self.throttle!r}")
        if self.rough < 0:
            raise InputError(f"segment rough must be >= 0, got {self.rough!r}")


@dataclass(frozen=True)
class Fault:
    """A combustion fault on one cylinder over a time span or a list of cycles."""

    kind: FaultKind
    cylinder: int
    start: float = 0.0
    end: float = math.inf
    probability: float = 1.0
    cycles: tuple[int, ...] | None = None
    fraction: float = 0.5  # partial_burn
    degrees: float = 0.0  # retard

    def __post_init__(self) -> None:
        if self.kind not in ("misfire", "partial_burn", "retard"):
            raise InputError(
                f"fault kind must be misfire, partial_burn or retard, got {self.kind!r}"
            )
        if self.cylinder < 1:
            raise InputError(f"fault cylinder is 1-based, got {self.cylinder!r}")
        if not 0.0 <= self.probability <= 1.0:
            raise InputError(f"fault probability must be within 0..1, got {self.probability!r}")
        if not 0.0 <= self.fraction <= 1.0:
            raise InputError(f"partial_burn fraction must be within 0..1, got {self.fraction!r}")


@dataclass(frozen=True)
class EngineSpec:
    """What differs between the rig file and the simulated engine, and the ECU's overrun cut."""

    true_layout: str | None = None
    fuel_cut_rpm: float = 1800.0
    fuel_cut_throttle: float = 1.0
    fuel_cut_hysteresis_rpm: float = 300.0
    fuel_cut: bool = True


@dataclass(frozen=True)
class Physics:
    """Physical parameters and their variations (defaults: a mid-size road bike, invented)."""

    inertia_scale: float = 1.0  # scales the rig's crank + flywheel inertia
    driveline_stiffness: float = 9000.0  # N·m/rad, torsional, referred to the rear wheel
    driveline_damping: float = 0.10  # modal damping ratio of the driveline mode
    combustion_cov: float = 0.03  # cycle-to-cycle scatter of the heat released (std / mean)
    cylinder_spread: float = 0.02  # std of the fixed cylinder-to-cylinder heat factors (seeded)
    phasing_scatter_deg: float = 1.5  # std of the combustion start, degrees
    compression_ratio: float = 12.5
    polytropic_compression: float = 1.32
    polytropic_expansion: float = 1.30
    wiebe_a: float = 5.0
    wiebe_m: float = 2.0
    vehicle_mass_kg: float = 260.0  # bike + rider
    wheel_radius_m: float = 0.30
    primary_ratio: float = 1.9
    final_ratio: float = 2.9
    gear_ratios: tuple[float, ...] = (2.6, 1.9, 1.5, 1.27, 1.1, 0.96)
    rolling_coeff: float = 0.018
    drag_area_m2: float = 0.55  # Cd·A
    fmep_bar: tuple[float, float, float] = (0.9, 0.12, 0.018)  # a + b·krpm + c·krpm², bar
    mount_hz: tuple[float, float] = (72.0, 118.0)  # bar resonances of the accelerometer mount
    mount_damping: float = 0.06
    road_noise_g: float = 0.08  # rms road noise at the sensor on a smooth road, g
    rough_gain: float = 1.0  # scales the crank-speed disturbance of rough sections
    # The driveline mode in every gear, Hz; 0 = from driveline_stiffness (the mode then moves
    # with the gear). A set frequency picks the referred stiffness gear by gear.
    driveline_hz: float = 0.0
    # A geared part on the crank (clutch basket, primary, gearbox input): inertia at its own
    # shaft, crank turns per shaft turn (0 = primary_ratio), the crank-to-part mode and its
    # damping ratio. 0 kg·m² = none (the crank turns alone, as the rig file says).
    geared_inertia_kgm2: float = 0.0
    geared_ratio: float = 0.0
    geared_hz: float = 180.0
    geared_damping: float = 0.05

    def __post_init__(self) -> None:
        for name in ("inertia_scale", "driveline_stiffness", "compression_ratio",
                     "vehicle_mass_kg", "wheel_radius_m"):
            if not getattr(self, name) > 0:
                raise InputError(f"physics {name} must be > 0, got {getattr(self, name)!r}")
        for name in ("driveline_hz", "geared_inertia_kgm2", "geared_ratio"):
            if not getattr(self, name) >= 0:
                raise InputError(f"physics {name} must be >= 0, got {getattr(self, name)!r}")
        if not 0.0 < self.geared_hz <= 2000.0:
            raise InputError(f"physics geared_hz must be within 0..2000, got {self.geared_hz!r}")
        if not 0.0 <= self.combustion_cov < 0.5:
            raise InputError(
                f"physics combustion_cov must be within 0..0.5, got {self.combustion_cov!r}"
            )


@dataclass(frozen=True)
class WheelSpec:
    error_rms_deg: float = 0.0


@dataclass(frozen=True)
class CanSpec:
    latency_s: float = 0.0004
    jitter_s: float = 0.0001
    drop_probability: float = 0.0
    unknown_ids: tuple[int, ...] = ()
    unknown_rate_hz: float = 10.0


@dataclass(frozen=True)
class SerialSpec:
    drift_ppm: float = 30.0
    clock_offset_s: float = 1234.5678  # device clock reading at the ride start, s
    chunk_ms: tuple[float, float] = (1.0, 16.0)  # host read intervals, uniform between
    arrival_jitter_ms: float = 1.5
    corrupt_probability: float = 0.0
    lost_probability: float = 0.0
    start_offset: int = 0


@dataclass(frozen=True)
class Scenario:
    """A complete ride request. See the module docstring for the file form."""

    segments: tuple[Segment, ...]
    seed: int = 0
    name: str = "ride"
    start_time: float = 1767225600.0
    coolant_c: tuple[float, float] = (62.0, 88.0)
    rig: str | None = None  # preset name or rig file the scenario was written for (metadata)
    faults: tuple[Fault, ...] = ()
    engine: EngineSpec = field(default_factory=EngineSpec)
    physics: Physics = field(default_factory=Physics)
    wheel: WheelSpec = field(default_factory=WheelSpec)
    can: CanSpec = field(default_factory=CanSpec)
    serial: SerialSpec = field(default_factory=SerialSpec)

    def __post_init__(self) -> None:
        if not self.segments:
            raise InputError("a scenario needs at least one segment")

    @property
    def duration(self) -> float:
        return float(sum(s.duration for s in self.segments))

    def with_changes(self, **changes: Any) -> Scenario:
        """A copy with top-level fields replaced (``physics=replace(sc.physics, ...)`` etc.)."""
        return replace(self, **changes)


# --- TOML ----------------------------------------------------------------------------------------

_SECTIONS = {"engine": EngineSpec, "physics": Physics, "wheel": WheelSpec, "can": CanSpec,
             "serial": SerialSpec}
_RIDE_KEYS = {"name", "seed", "start_time", "coolant_c", "rig"}


def _tuplify(value: Any) -> Any:
    return tuple(_tuplify(v) for v in value) if isinstance(value, list) else value


def _build(cls: type, table: dict[str, Any], where: str) -> Any:
    known = {f.name for f in fields(cls)}
    unknown = sorted(set(table) - known)
    if unknown:
        raise InputError(f"{where}: unknown key {unknown[0]!r}, expected one of {sorted(known)}")
    try:
        return cls(**{k: _tuplify(v) for k, v in table.items()})
    except TypeError as exc:
        raise InputError(f"{where}: {exc}") from None


def scenario_from_dict(doc: dict[str, Any], *, where: str = "scenario") -> Scenario:
    """Build a :class:`Scenario` from the parsed TOML document (see the module docstring)."""
    known = {"ride", "segment", "fault"} | set(_SECTIONS)
    unknown = sorted(set(doc) - known)
    if unknown:
        raise InputError(
            f"{where}: unknown section {unknown[0]!r}, expected one of {sorted(known)}"
        )
    ride = dict(doc.get("ride", {}))
    bad = sorted(set(ride) - _RIDE_KEYS)
    if bad:
        raise InputError(
            f"{where}: ride: unknown key {bad[0]!r}, expected one of {sorted(_RIDE_KEYS)}"
        )
    segs = doc.get("segment", [])
    if not segs:
        raise InputError(f"{where}: no [[segment]] tables, expected at least one")
    segments = tuple(_build(Segment, s, f"{where}: segment[{i}]") for i, s in enumerate(segs))
    faults = tuple(_build(Fault, f, f"{where}: fault[{i}]")
                   for i, f in enumerate(doc.get("fault", [])))
    parts = {name: _build(cls, doc.get(name, {}), f"{where}: {name}")
             for name, cls in _SECTIONS.items()}
    kwargs = {k: _tuplify(v) for k, v in ride.items()}
    return Scenario(segments=segments, faults=faults, **parts, **kwargs)


def load_scenario(path: str | os.PathLike) -> Scenario:
    """Read a scenario file; any problem becomes one ``InputError`` line naming the file."""
    p = Path(path)
    try:
        doc = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{p}: no such scenario file") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: not valid TOML: {exc}") from None
    return scenario_from_dict(doc, where=str(p))


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, tuple | list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise InputError(f"cannot write {v!r} to a scenario file")


def _table_lines(values: dict[str, Any], defaults: dict[str, Any] | None = None) -> list[str]:
    out = []
    for k, v in values.items():
        if v is None or (defaults is not None and defaults.get(k) == v):
            continue
        out.append(f"{k} = {_toml_value(v)}")
    return out


def scenario_to_toml(sc: Scenario) -> str:
    """The scenario as a scenario file; :func:`scenario_from_dict` reads it back unchanged."""
    lines = ["# crankbeat ride scenario (written by the simulator)", "[ride]"]
    lines += _table_lines({"name": sc.name, "seed": sc.seed, "start_time": sc.start_time,
                           "coolant_c": sc.coolant_c, "rig": sc.rig})
    seg_defaults = {"gear": 0, "rough": 0.0, "label": ""}
    for s in sc.segments:
        lines += ["", "[[segment]]"] + _table_lines(asdict(s), seg_defaults)
    fault_defaults = {"start": 0.0, "end": math.inf, "probability": 1.0, "fraction": 0.5,
                      "degrees": 0.0}
    for f in sc.faults:
        lines += ["", "[[fault]]"] + _table_lines(asdict(f), fault_defaults)
    for name, cls in _SECTIONS.items():
        body = _table_lines(asdict(getattr(sc, name)), asdict(cls()))
        if body:
            lines += ["", f"[{name}]"] + body
    return "\n".join(lines) + "\n"
