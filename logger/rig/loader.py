"""Read a rig file (or a shipped preset) into the checked dataclasses of :mod:`logger.rig.model`.

Every problem found is one line ``<file>: <key path>: <what was wrong>, expected <what>``; all
of them are collected and raised together as one :class:`~dsp.errors.RigError` (first line the
count when there are several).

The file (see ``logger/presets/larch.toml`` for a complete one)::

    [rig]      name, description
    [engine]   layout = "<preset>" | stroke_cycle, firing_order, [[engine.cylinder]]
               (pin_deg, bank_deg, position_mm, firing_deg); bore_mm, stroke_mm, conrod_mm,
               recip_mass_kg, inertia_kgm2 (override the layout's); firing_deg = [...]
    [limits]   idle_rpm, rev_limit_rpm, misfire_alert_pct, interval_tolerance_deg,
               misfire_threshold (all optional)
    [wheel]    teeth, missing, tdc_offset_deg, cam = "window" | "none", cam_active_level
    [can]      interface, channel, bitrate, fd; [[can.message]] name, id, extended, length,
               rate_hz; [[can.message.signal]] name, start_bit, length, byte_order, signed,
               scale, offset, unit, count, role, saturated_raw, modulo
    [[serial]] name, location, mount, axes, port, baud, sample_rate_hz, frame_length, sync,
               sequence_modulo, device_time_modulo, device_time_unit_s,
               checksum = { kind, start, end, at, byte_order }; [[serial.field]] name, offset,
               dtype, byte_order, scale, unit, role

Unknown keys are errors (a typo must not silently fall back to a default). Counter ``modulo``
defaults to 2**length; a sensor's sequence/device-time modulo to the size of its field.
"""

from __future__ import annotations

import os
from importlib import resources
from pathlib import Path
from typing import get_args

from crankbeat.dsp.crank import ToothWheel
from crankbeat.errors import InputError, RigError
from crankbeat.logger.rig.candb import expand_can_database
from crankbeat.logger.rig.layouts import read_rig_engine
from crankbeat.logger.rig.model import (
    CAN_ROLES,
    SERIAL_ROLES,
    CanBus,
    CanMessage,
    CanSignal,
    Checksum,
    ChecksumKind,
    Limits,
    Location,
    Rig,
    SerialField,
    SerialSensor,
)
from crankbeat.logger.rig.schema import Problems, Section, parse_toml
from crankbeat.logger.rig.validate import check_messages, check_sensor

__all__ = ["list_presets", "load_rig"]

DIRECTIONS = {  # unit vectors in the bike frame (x forward, y left, z up)
    "forward": (1, 0, 0), "back": (-1, 0, 0), "left": (0, 1, 0), "right": (0, -1, 0),
    "up": (0, 0, 1), "down": (0, 0, -1),
}
DTYPES = ("u8", "i8", "u16", "i16", "u32", "i32")
BYTE_ORDERS = ("little", "big")
_POSITIVE = {"check": lambda v: v > 0, "expected": "a value > 0"}


def list_presets() -> list[str]:
    """Names of the rig presets shipped in ``logger/presets/``, sorted."""
    root = resources.files("crankbeat.logger.presets")
    return sorted(p.name[:-5] for p in root.iterdir() if p.name.endswith(".toml"))


def _read_spec(spec: str | os.PathLike[str]) -> tuple[str, str, str, Path | None]:
    """(text, file label for messages, Rig.source, directory for relative layout paths)."""
    path = Path(spec)
    text_spec = os.fspath(spec)
    if path.is_file():
        try:
            return path.read_text(encoding="utf-8"), text_spec, text_spec, path.parent
        except UnicodeDecodeError as exc:
            raise RigError(f"{text_spec}: byte {exc.start}: not UTF-8 text, expected a TOML "
                           "rig file") from None
        except OSError as exc:
            raise RigError(f"{text_spec}: cannot be read ({exc.strerror})") from None
    presets = list_presets()
    if isinstance(spec, str) and spec in presets:
        entry = resources.files("crankbeat.logger.presets").joinpath(f"{spec}.toml")
        return entry.read_text(encoding="utf-8"), f"presets/{spec}.toml", f"preset:{spec}", None
    if path.is_dir():
        raise RigError(f"{text_spec}: is a directory, expected a rig file or a preset name")
    raise RigError(f"no such rig file or preset {text_spec!r} (presets: {', '.join(presets)})")


def load_rig(spec: str | os.PathLike[str]) -> Rig:
    """Load and check a rig.

    Parameters
    ----------
    spec : str or path-like
        A path to a TOML rig file, or the name of a shipped preset (see :func:`list_presets`).
        An existing file wins over a preset of the same name.

    Returns
    -------
    Rig
        Frozen, fully checked; lengths in metres, angles in degrees, times in seconds.

    Raises
    ------
    RigError
        Missing file, invalid TOML (with line and column), or any inconsistency; the message has
        one line per problem.
    """
    text, label, source, base_dir = _read_spec(spec)
    return parse_rig(text, label=label, source=source, base_dir=base_dir)


def parse_rig(text: str, *, label: str, source: str, base_dir: Path | None = None) -> Rig:
    """Check rig TOML text; ``label`` names the file in messages (see :func:`load_rig`)."""
    problems = Problems(label)
    doc = parse_toml(text, label)
    expand_can_database(doc, base_dir=base_dir, problems=problems)  # layouts from a CAN database
    top = Section(doc, "", problems)
    rig_sec = top.table("rig", required=True)
    name, description = "", ""
    if rig_sec is not None:
        name = rig_sec.get("name", "str", required=True, default="")
        description = rig_sec.get("description", "str", default="")
        rig_sec.finish()
    eng_sec = top.table("engine", required=True)
    engine = None
    if eng_sec is not None:
        engine = read_rig_engine(eng_sec, rig_name=name, base_dir=base_dir)
    limits = _read_limits(top.table("limits"))
    wheel = _read_wheel(top.table("wheel", required=True))
    can_bus, messages = _read_can(top.table("can", required=True))
    sensors = _read_sensors(top.tables("serial"))
    top.finish()
    if wheel is not None and messages is not None:
        _check_rig_roles(wheel, messages, problems)
    problems.raise_if_any()
    assert engine and wheel and can_bus and messages is not None and sensors is not None
    return Rig(name=name, description=description, source=source, engine=engine, wheel=wheel,
               can_bus=can_bus, messages=messages, sensors=sensors, limits=limits or Limits())


def _read_limits(sec: Section | None) -> Limits | None:
    if sec is None:
        return Limits()
    d = Limits()
    kw = {
        k: sec.get(k, "float", default=getattr(d, k), **_POSITIVE)
        for k in ("idle_rpm", "rev_limit_rpm", "interval_tolerance_deg")
    }
    kw["misfire_alert_pct"] = sec.get(
        "misfire_alert_pct", "float", default=d.misfire_alert_pct,
        check=lambda v: 0 < v <= 100, expected="a percentage in (0, 100]",
    )
    kw["misfire_threshold"] = sec.get("misfire_threshold", "float", **_POSITIVE)
    if kw["idle_rpm"] >= kw["rev_limit_rpm"]:
        sec.problem("rev_limit_rpm", f"{kw['rev_limit_rpm']:g} rpm is not above idle_rpm "
                    f"{kw['idle_rpm']:g}", "rev_limit_rpm > idle_rpm")
    sec.finish()
    return Limits(**kw)


def _read_wheel(sec: Section | None) -> ToothWheel | None:
    if sec is None:
        return None
    before = len(sec.problems)
    teeth = sec.get("teeth", "int", required=True, default=60,
                    check=lambda v: v >= 2, expected="at least 2 tooth positions")
    missing = sec.get("missing", "int", required=True, default=0,
                      check=lambda v: v >= 1, expected="at least 1 (the gap marks tooth 0)")
    if missing >= teeth:
        sec.problem("missing", f"{missing} missing of {teeth} teeth",
                    f"fewer than teeth = {teeth}")
    tdc = sec.get("tdc_offset_deg", "float", required=True, default=0.0,
                  check=lambda v: 0 <= v < 360, expected="crank degrees in 0..360 (360 excluded)")
    cam = sec.choice("cam", ("window", "none"), required=True, default="none")
    level = sec.get("cam_active_level", "int", default=1, check=lambda v: v in (0, 1),
                    expected="0 or 1")
    sec.finish()
    if len(sec.problems) > before:
        return None
    try:
        return ToothWheel(teeth=teeth, missing=missing, tdc_offset_deg=tdc, cam=cam,
                          cam_active_level=level)
    except InputError as exc:  # what the crank reconstruction can follow (e.g. the gap's size)
        sec.problem("teeth", str(exc), "a wheel the crank reconstruction can follow")
        return None


def _read_can(sec: Section | None) -> tuple[CanBus | None, tuple[CanMessage, ...] | None]:
    if sec is None:
        return None, None
    d = CanBus()
    bus = CanBus(
        interface=sec.get("interface", "str", default=d.interface),
        channel=sec.get("channel", "str", default=d.channel),
        bitrate=sec.get("bitrate", "int", default=d.bitrate, **_POSITIVE),
        fd=sec.get("fd", "bool", default=d.fd),
    )
    built: list[tuple[int, CanMessage]] = []
    msg_secs = sec.tables("message", required=True)
    if "message" in sec.data and not msg_secs:
        sec.problem("message", "no messages", "at least one [[can.message]]")
    for mi, m in enumerate(msg_secs):
        msg = _read_message(m)
        if msg is not None:
            built.append((mi, msg))
    sec.finish()
    ok = len(built) == len(msg_secs)
    check_messages(built, sec.problems, fd=bus.fd)
    return bus, tuple(msg for _, msg in built) if ok else None


def _read_message(sec: Section) -> CanMessage | None:
    before = len(sec.problems)
    name = sec.get("name", "str", required=True, default="?")
    can_id = sec.get("id", "int", required=True, default=0)
    extended = sec.get("extended", "bool", default=False)
    length = sec.get("length", "int", default=8, check=lambda v: v >= 0, expected="bytes >= 0")
    rate = sec.get("rate_hz", "float", **_POSITIVE)
    sig_secs = sec.tables("signal", required=True)
    if "signal" in sec.data and not sig_secs:
        sec.problem("signal", "no signals", "at least one [[can.message.signal]]")
    signals = [_read_signal(s) for s in sig_secs]
    sec.finish()
    if len(sec.problems) > before:
        return None
    return CanMessage(name=name, can_id=can_id, extended=extended, length=length,
                      signals=tuple(signals), rate_hz=rate)  # type: ignore[arg-type]


def _read_signal(sec: Section) -> CanSignal | None:
    before = len(sec.problems)
    name = sec.get("name", "str", required=True, default="?")
    start = sec.get("start_bit", "int", required=True, default=0,
                    check=lambda v: v >= 0, expected="a bit number >= 0")
    length = sec.get("length", "int", required=True, default=1,
                     check=lambda v: 1 <= v <= 64, expected="1..64 bits")
    order = sec.choice("byte_order", BYTE_ORDERS, default="little")
    signed = sec.get("signed", "bool", default=False)
    scale = sec.get("scale", "float", default=1.0, check=lambda v: v != 0,
                    expected="a non-zero number")
    offset = sec.get("offset", "float", default=0.0)
    unit = sec.get("unit", "str", default="")
    count = sec.get("count", "int", default=1, check=lambda v: v >= 1, expected="count >= 1")
    role = sec.choice("role", CAN_ROLES)
    saturated = sec.get("saturated_raw", "int")
    modulo = sec.get("modulo", "int", check=lambda v: v >= 2, expected="an integer >= 2")
    sec.finish()
    if len(sec.problems) > before:
        return None
    lo, hi = (-(2 ** (length - 1)), 2 ** (length - 1) - 1) if signed else (0, 2**length - 1)
    if saturated is not None and not lo <= saturated <= hi:
        sec.problem("saturated_raw", f"{saturated} does not fit in {length} bits",
                    f"a raw value in {lo}..{hi}")
    if count > 1 and role not in (None, "tooth_periods"):
        sec.problem("count", f"{count} elements for role {role!r}",
                    "count = 1 (only tooth_periods is an array)")
    if role == "counter":
        if signed:
            sec.problem("signed", "a signed counter", "signed = false for role 'counter'")
        if modulo is None:
            modulo = 2**length
        elif modulo > 2**length:
            sec.problem("modulo", f"{modulo} exceeds what {length} bits can count",
                        f"at most {2**length}")
    elif modulo is not None:
        sec.problem("modulo", f"modulo on a signal with role {role!r}",
                    "modulo only with role = 'counter'")
    if role == "tooth_periods" and scale <= 0:
        sec.problem("scale", f"{scale:g} for tooth periods", "seconds per bit > 0")
    if len(sec.problems) > before:
        return None
    return CanSignal(name=name, start_bit=start, length=length, byte_order=order, signed=signed,
                     scale=scale, offset=offset, unit=unit, count=count, role=role,
                     saturated_raw=saturated, modulo=modulo)  # type: ignore[arg-type]


def _check_rig_roles(wheel: ToothWheel, messages: tuple[CanMessage, ...],
                     problems: Problems) -> None:
    roles = {s.role for m in messages for s in m.signals}
    if "tooth_periods" not in roles:
        problems.add("can.message", "no signal has role 'tooth_periods'",
                     "one array signal of crank tooth periods")
    if wheel.cam == "window" and "cam_level" not in roles:
        problems.add("wheel.cam", "'window' but no signal has role 'cam_level'",
                     "a cam_level signal, or cam = 'none'")


def _read_sensors(secs: list[Section]) -> tuple[SerialSensor, ...] | None:
    out: list[SerialSensor] = []
    names: dict[str, int] = {}
    for idx, sec in enumerate(secs):
        sensor = _read_sensor(sec)
        if sensor is None:
            continue
        if sensor.name in names:
            sec.problem("name", f"{sensor.name!r} is also the name of serial[{names[sensor.name]}]",
                        "unique sensor names")
        names.setdefault(sensor.name, idx)
        check_sensor(idx, sensor, sec.problems)
        out.append(sensor)
    return tuple(out) if len(out) == len(secs) else None


def _read_axes(sec: Section) -> tuple[str, str, str] | None:
    axes = sec.get("axes", "strs", required=True, check=lambda v: len(v) == 3,
                   expected="3 directions for sensor x, y, z")
    if axes is None:
        return None
    bad = [a for a in axes if a not in DIRECTIONS]
    if bad:
        sec.problem("axes", f"unknown direction {bad[0]!r}", "each of " + ", ".join(DIRECTIONS))
        return None
    x, y, z = (DIRECTIONS[a] for a in axes)
    det = (x[0] * (y[1] * z[2] - y[2] * z[1]) - x[1] * (y[0] * z[2] - y[2] * z[0])
           + x[2] * (y[0] * z[1] - y[1] * z[0]))
    if det == 0:
        sec.problem("axes", f"{axes} name the same bike axis twice",
                    "three mutually perpendicular directions")
        return None
    if det < 0:  # a MEMS accelerometer's own axes are always right-handed
        sec.problem("axes", f"{axes} form a left-handed frame",
                    "a right-handed set such as forward, left, up")
        return None
    return (axes[0], axes[1], axes[2])


def _read_checksum(sec: Section) -> Checksum | None:
    cs = sec.table("checksum", required=True)
    if cs is None:
        return None
    before = len(sec.problems)
    kind = cs.choice("kind", get_args(ChecksumKind), required=True, default="none")
    d = Checksum()
    need = kind != "none"
    start = cs.get("start", "int", required=need, default=d.start)
    end = cs.get("end", "int", required=need, default=d.end)
    at = cs.get("at", "int", required=need, default=d.at)
    order = cs.choice("byte_order", BYTE_ORDERS, default="little")
    cs.finish()
    if len(sec.problems) > before:
        return None
    return Checksum(kind=kind, start=start, end=end, at=at, byte_order=order)  # type: ignore


def _read_field(sec: Section) -> SerialField:
    return SerialField(
        name=sec.get("name", "str", required=True, default="?"),
        offset=sec.get("offset", "int", required=True, default=0,
                       check=lambda v: v >= 0, expected="a byte offset >= 0"),
        dtype=sec.choice("dtype", DTYPES, required=True, default="u8"),  # type: ignore[arg-type]
        byte_order=sec.choice("byte_order", BYTE_ORDERS, default="little"),  # type: ignore
        scale=sec.get("scale", "float", default=1.0, check=lambda v: v != 0,
                      expected="a non-zero number"),
        unit=sec.get("unit", "str", default=""),
        role=sec.choice("role", SERIAL_ROLES),
    )


def _read_sensor(sec: Section) -> SerialSensor | None:
    before = len(sec.problems)
    name = sec.get("name", "str", required=True, default="?",
                   check=lambda v: v.isidentifier(),
                   expected="letters, digits and _ (it names an environment variable)")
    location = sec.choice("location", get_args(Location), required=True)
    mount = sec.get("mount", "str", default="")
    axes = _read_axes(sec)
    port = sec.get("port", "str", default="")
    baud = sec.get("baud", "int", required=True, default=0, **_POSITIVE)
    rate = sec.get("sample_rate_hz", "float", required=True, default=0.0, **_POSITIVE)
    frame_length = sec.get("frame_length", "int", required=True, default=0, **_POSITIVE)
    sync = sec.get("sync", "ints", required=True, default=[],
                   check=lambda v: len(v) >= 1 and all(0 <= b <= 255 for b in v),
                   expected="one or more byte values 0..255")
    seq_mod = sec.get("sequence_modulo", "int", **_POSITIVE)
    time_mod = sec.get("device_time_modulo", "int", **_POSITIVE)
    time_unit = sec.get("device_time_unit_s", "float", default=1e-6, **_POSITIVE)
    checksum = _read_checksum(sec)
    field_secs = sec.tables("field", required=True)
    fields = []
    for f in field_secs:
        fields.append(_read_field(f))
        f.finish()
    sec.finish()
    if len(sec.problems) > before:
        return None
    by_role = {f.role: f for f in fields}
    if seq_mod is None:  # a counter wraps where its field runs out, unless told otherwise
        seq_mod = 2 ** (8 * by_role["sequence"].size) if "sequence" in by_role else 65536
    if time_mod is None:
        time_mod = 2 ** (8 * by_role["device_time"].size) if "device_time" in by_role else 2**32
    return SerialSensor(
        name=name, location=location, mount=mount, axes=axes, port=port,  # type: ignore
        baud=baud, sample_rate_hz=rate, frame_length=frame_length, sync=bytes(sync),
        fields=tuple(fields), checksum=checksum, sequence_modulo=seq_mod,  # type: ignore
        device_time_modulo=time_mod, device_time_unit_s=time_unit,
    )
