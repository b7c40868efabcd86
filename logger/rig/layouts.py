"""Engine layout presets (``logger/presets/layouts/NAME.toml``) and the rig's ``[engine]`` table.

A layout file gives the crank: ``stroke_cycle``, ``firing_order`` and one ``[[engine.cylinder]]``
per cylinder (``pin_deg``, ``bank_deg``, ``position_mm``, optional ``firing_deg``); it may also
give geometry defaults (``bore_mm``, ``stroke_mm``, ``conrod_mm``, ``recip_mass_kg``,
``inertia_kgm2``). A rig's ``[engine]`` either names ``layout = "..."`` or gives the crank itself,
and its geometry keys override the layout's.
"""

from __future__ import annotations

import math
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.errors import InputError, RigError, UnknownLayoutError
from crankbeat.logger.rig.schema import Problems, Section, parse_toml

__all__ = ["list_layouts", "load_layout"]

#: file key, Engine field, factor from file unit to SI
GEOMETRY = (
    ("bore_mm", "bore_m", 1e-3),
    ("stroke_mm", "stroke_m", 1e-3),
    ("conrod_mm", "conrod_m", 1e-3),
    ("recip_mass_kg", "recip_mass_kg", 1.0),
    ("inertia_kgm2", "inertia_kgm2", 1.0),
)
_INLINE_KEYS = ("stroke_cycle", "firing_order", "cylinder")


def _layout_dir() -> Any:
    return resources.files("crankbeat.logger.presets").joinpath("layouts")


def list_layouts() -> list[str]:
    """Names of the shipped engine layout presets, sorted."""
    return sorted(p.name[:-5] for p in _layout_dir().iterdir() if p.name.endswith(".toml"))


def _layout_text(name: str, base_dir: Path | None) -> tuple[str, str]:
    """(TOML text, file label) of a layout preset name or a ``.toml`` path."""
    if name.endswith(".toml"):
        path = Path(name)
        if base_dir is not None and not path.is_absolute():
            path = base_dir / path
        try:
            return path.read_text(encoding="utf-8"), str(path)
        except (OSError, UnicodeDecodeError) as exc:
            raise UnknownLayoutError(f"cannot read layout file {str(path)!r} ({exc})") from None
    entry = _layout_dir().joinpath(f"{name}.toml")
    if name not in list_layouts():
        raise UnknownLayoutError(f"unknown layout {name!r}")
    return entry.read_text(encoding="utf-8"), f"presets/layouts/{name}.toml"


def read_crank(sec: Section) -> dict[str, Any] | None:
    """Crank layout keys of an ``[engine]`` table as Engine keyword arguments (None on problems)."""
    before = len(sec.problems)
    stroke = sec.get(
        "stroke_cycle", "int", required=True, check=lambda v: v in (2, 4), expected="2 or 4"
    )
    order = sec.get("firing_order", "ints", required=True, default=[])
    cyls = sec.tables("cylinder", required=True)
    if "cylinder" in sec.data and not cyls:
        sec.problem("cylinder", "no cylinders", "at least one [[engine.cylinder]]")
    pins, banks, pos, fire = [], [], [], []
    for c in cyls:
        pins.append(c.get("pin_deg", "float", required=True, default=0.0))
        banks.append(c.get("bank_deg", "float", default=0.0))
        pos.append(c.get("position_mm", "float", required=True, default=0.0) * 1e-3)
        fire.append(c.get("firing_deg", "float"))
        c.finish()
    n = len(cyls)
    if n and sorted(order) != list(range(1, n + 1)) and "firing_order" in sec.data:
        sec.problem(
            "firing_order", f"{order} does not name each of the {n} cylinders exactly once",
            f"an ordering of 1..{n}",
        )
    given = [f for f in fire if f is not None]
    if given and len(given) != n:
        sec.problem(
            "cylinder", f"firing_deg is given for {len(given)} of {n} cylinders",
            "it on every cylinder or on none",
        )
    if len(sec.problems) > before:
        return None
    return {
        "stroke_cycle": stroke,
        "pin_deg": tuple(pins),
        "bank_deg": tuple(banks),
        "position_m": tuple(pos),
        "firing_order": tuple(order),
        "firing_deg": tuple(fire) if given else None,
    }


def read_geometry(sec: Section) -> dict[str, float]:
    """Geometry keys present in an ``[engine]`` table, converted to Engine fields (SI)."""
    out: dict[str, float] = {}
    for key, field, factor in GEOMETRY:
        v = sec.get(key, "float", check=lambda v: v > 0, expected="a value > 0")
        if v is not None:
            out[field] = v * factor
    return out


def _check_firing_deg(engine: Engine, sec: Section, key: str) -> bool:
    """Explicit firing angles must sit on a TDC of their cylinder and follow the firing order."""
    assert engine.firing_deg is not None
    f = np.asarray(engine.firing_deg, dtype=float)
    rel = np.mod(f - f[0], engine.cycle_deg)
    tdc = np.mod(engine.tdc_deg() - engine.tdc_deg()[0], 360.0)
    ok = True
    for k in range(engine.n_cylinders):
        off = math.remainder(rel[k] - tdc[k], 360.0)
        if abs(off) > 1e-6:
            tdcs = [float(tdc[k])] if engine.stroke_cycle == 2 else [float(tdc[k]), tdc[k] + 360]
            sec.problem(
                key, f"cylinder {k + 1} fires at {f[k]:g} deg, which is not one of its TDCs",
                "one of " + ", ".join(f"{t:g}" for t in tdcs) + " deg (relative to cylinder 1)",
            )
            ok = False
    by_angle = tuple(int(i) + 1 for i in np.argsort(rel, kind="stable"))
    if ok and by_angle != engine.firing_order:
        sec.problem(
            key, f"angles {list(engine.firing_deg)} fire the cylinders in the order "
            f"{list(by_angle)}", f"the firing_order {list(engine.firing_order)}",
        )
        ok = False
    return ok


def build_engine(name: str, crank: dict[str, Any], geometry: dict[str, float],
                 sec: Section) -> Engine | None:
    """Make the Engine, turning its own InputError into a problem on ``sec``."""
    stroke = geometry.get("stroke_m", Engine.stroke_m)
    conrod = geometry.get("conrod_m", Engine.conrod_m)
    if conrod <= stroke / 2:
        sec.problem(
            "conrod_mm", f"{conrod * 1e3:g} mm is not longer than the crank radius "
            f"{stroke * 1e3 / 2:g} mm", f"conrod_mm > stroke_mm / 2 = {stroke * 1e3 / 2:g}",
        )
        return None
    try:
        engine = Engine(name=name, **crank, **geometry)
    except InputError as exc:
        sec.problem(None, str(exc))
        return None
    if engine.firing_deg is not None:
        return engine if _check_firing_deg(engine, sec, "firing_deg") else None
    from crankbeat.dsp.layout import firing_angles  # the lead's rule decides which TDC fires

    try:
        firing_angles(engine)
    except InputError as exc:
        sec.problem("firing_order", str(exc), "pins and order that can fire in that order")
        return None
    return engine


def _layout_parts(name: str, base_dir: Path | None) -> tuple[dict[str, Any], dict[str, float], str]:
    """Crank, geometry defaults and name of a layout; RigError naming the layout file if bad."""
    text, label = _layout_text(name, base_dir)
    problems = Problems(label)
    top = Section(parse_toml(text, label), "", problems)
    sec = top.table("engine", required=True)
    crank, geometry, lname = None, {}, name
    if sec is not None:
        lname = sec.get("name", "str", default=Path(name).stem)
        sec.get("description", "str")
        crank = read_crank(sec)
        if sec.has("firing_deg"):
            _apply_firing_override(sec, crank)
        geometry = read_geometry(sec)
        sec.finish()
    top.finish()
    problems.raise_if_any()
    assert crank is not None
    return crank, geometry, lname


def _apply_firing_override(sec: Section, crank: dict[str, Any] | None) -> None:
    fdeg = sec.get("firing_deg", "floats")
    if fdeg is None or crank is None:
        return
    n = len(crank["pin_deg"])
    if len(fdeg) != n:
        sec.problem("firing_deg", f"{len(fdeg)} angles for {n} cylinders", f"{n} angles")
        return
    crank["firing_deg"] = tuple(fdeg)


def load_layout(name: str) -> Engine:
    """The Engine of a layout preset (or a layout ``.toml`` path), with its geometry defaults.

    Parameters
    ----------
    name : str
        A name from :func:`list_layouts` (``"twin-270"``) or a path ending in ``.toml``.

    Raises
    ------
    RigError
        Unknown name (the message lists the presets) or a bad layout file.
    """
    try:
        crank, geometry, lname = _layout_parts(name, None)
    except UnknownLayoutError as exc:
        raise RigError(f"{exc}, expected one of {', '.join(list_layouts())}") from None
    label = name if name.endswith(".toml") else f"presets/layouts/{name}.toml"
    problems = Problems(label)
    engine = build_engine(lname, crank, geometry, Section({}, "engine", problems))
    problems.raise_if_any()
    assert engine is not None
    return engine


def read_rig_engine(sec: Section, *, rig_name: str, base_dir: Path | None) -> Engine | None:
    """The rig's ``[engine]`` table: a named layout or an inline crank, plus geometry."""
    before = len(sec.problems)
    layout = sec.get("layout", "str")
    crank: dict[str, Any] | None = None
    defaults: dict[str, float] = {}
    if layout is not None:
        name = sec.get("name", "str", default=Path(layout).stem)
        for key in _INLINE_KEYS:
            if sec.has(key):
                sec.seen.add(key)
                sec.problem(
                    key, f"given together with layout = {layout!r}",
                    "either a layout preset or an inline crank (stroke_cycle, firing_order, "
                    "[[engine.cylinder]]), not both",
                )
        try:
            crank, defaults, _ = _layout_parts(layout, base_dir)
        except UnknownLayoutError as exc:
            sec.problem("layout", str(exc), "one of " + ", ".join(list_layouts()))
    else:
        name = sec.get("name", "str", default=rig_name)
        crank = read_crank(sec)
    _apply_firing_override(sec, crank)
    geometry = {**defaults, **read_geometry(sec)}
    for key, field, _ in GEOMETRY:
        if field not in geometry and not sec.has(key):
            why = "the layout gives no default" if layout else "an inline crank has no default"
            sec.problem(key, "missing", f"a value > 0 ({why})")
    sec.finish()
    if len(sec.problems) > before or crank is None:
        return None
    return build_engine(name, crank, geometry, sec)
