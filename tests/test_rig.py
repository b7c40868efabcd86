"""Rig loading and validation: one clear line per problem, bit layouts checked against cantools.

Each bad rig is the shipped larch (or alder) preset with one edit, written into tmp_path, so
every case differs from a known-good file by exactly the mistake under test.
"""

from __future__ import annotations

import itertools
from importlib import resources
from pathlib import Path

import pytest
from cantools.database.can import Message as CtMessage
from cantools.database.can import Signal as CtSignal
from cantools.database.errors import Error as CantoolsError
from hypothesis import given, settings
from hypothesis import strategies as st

from crankbeat.errors import RigError
from crankbeat.logger.rig import (
    CanMessage,
    CanSignal,
    load_rig,
    occupied_bits,
    resolve_can_bus,
    resolve_serial_port,
)
from crankbeat.logger.rig.schema import Problems
from crankbeat.logger.rig.validate import check_messages

_PRESETS = resources.files("crankbeat.logger.presets")
Larch = _PRESETS.joinpath("larch.toml").read_text(encoding="utf-8")
Alder = _PRESETS.joinpath("alder.toml").read_text(encoding="utf-8")

# larch with its engine written out inline: the crank tables go after the geometry keys
M1_INLINE = Larch.replace('layout = "twin-270"', "").replace(
    "inertia_kgm2 = 0.021", """inertia_kgm2 = 0.021
stroke_cycle = 4
firing_order = [1, 2]
  [[engine.cylinder]]
  pin_deg = 0.0
  position_mm = -47.0
  [[engine.cylinder]]
  pin_deg = 270.0
  position_mm = 47.0
""")


def edited(tmp_path: Path, old: str, new: str, *, base: str = Larch) -> Path:
    """The base rig with one edit, as a file; the edit must apply exactly once."""
    assert base.count(old) == 1, f"test edit {old!r} is ambiguous or absent"
    path = tmp_path / "bad.toml"
    path.write_text(base.replace(old, new), encoding="utf-8")
    return path


def problems(path: Path) -> list[str]:
    with pytest.raises(RigError) as info:
        load_rig(path)
    lines = info.value.problems  # type: ignore[attr-defined]
    text = str(info.value).splitlines()
    # one line per problem, each naming the file; a count line first when there are several
    assert all("\n" not in line and line.startswith(f"{path}: ") for line in lines)
    assert text == (lines if len(lines) == 1 else [f"{path}: {len(lines)} problems", *lines])
    return lines


# (edit old, edit new, base, key path in the message, fragments that must follow it)
CASES = {
    "unknown key (typo)": (
        "cam_active_level = 1", "cam_active_level = 1\ncam_actve = 0", Larch,
        "wheel", ["unknown key 'cam_actve'", "did you mean 'cam_active_level'", "expected one of"],
    ),
    "missing required key": (
        "baud = 921600\n", "", Larch, "serial[0].baud (bar_left)", ["missing", "expected"],
    ),
    "wrong type": (
        "bitrate = 1000000", 'bitrate = "1M"', Larch, "can.bitrate",
        ["got '1M' (string)", "expected an integer"],
    ),
    "overlap, little-endian": (
        "start_bit = 8\n  length = 1", "start_bit = 17\n  length = 1", Larch,
        "can.message[0].signal[2] (tooth_period)",
        ["bits 16..63 overlap signal 'cam_level' bits 17..17", "expected signals on separate"],
    ),
    "overlap, big-endian": (
        "start_bit = 23             # byte 2", "start_bit = 15", Alder,
        "can.message[1].signal[1] (throttle)",
        ["bits 8..15 overlap signal 'rpm' bits 0..15", "shared bits 8..15"],
    ),
    "signal beyond the frame": (
        "start_bit = 40", "start_bit = 56", Larch, "can.message[1].signal[4] (road_speed)",
        ["bits 56..71 lie beyond the 8-byte frame", "expected all bits within 0..63"],
    ),
    "array beyond the frame": (
        "count = 3", "count = 4", Larch, "can.message[0].signal[2] (tooth_period)",
        ["element 3 of 4 (bits 64..79)", "expected count * length to fit in bits 0..63"],
    ),
    "array beyond the frame, big-endian": (
        "count = 3\n  byte_order", "count = 4\n  byte_order", Alder,
        "can.message[0].signal[1] (tooth_period)", ["element 3 of 4", "beyond the 8-byte frame"],
    ),
    "unknown role": (
        'role = "gear"', 'role = "gearbox"', Larch, "can.message[1].signal[2].role (gear)",
        ["got 'gearbox' (string)", "expected one of tooth_periods, cam_level, counter"],
    ),
    "rig-unique role twice": (
        'role = "throttle"', 'role = "engine_speed"', Larch,
        "can.message[1].signal[1].role (throttle)",
        ["role 'engine_speed' is already fed by engine_status.engine_speed",
         "at most once per rig"],
    ),
    "two counters in one message": (
        'role = "gear"', 'role = "counter"', Larch,
        "can.message[1].signal[5].role (status_counter)",
        ["a second counter in this message (first: 'gear')", "at most one counter per message"],
    ),
    "11-bit id too large": (
        "id = 0x100", "id = 0x800", Larch, "can.message[1].id (engine_status)",
        ["0x800 does not fit in 11 bits", "expected 0x0..0x7FF", "extended = true"],
    ),
    "29-bit id too large": (
        "id = 0x18FF10A0", "id = 0x20000000", Alder, "can.message[0].id (crank_teeth)",
        ["0x20000000 does not fit in 29 bits", "expected 0x0..0x1FFFFFFF"],
    ),
    "duplicate id": (
        "id = 0x100", "id = 0x0A0", Larch, "can.message[1].id (engine_status)",
        ["0xA0 is also the id of can.message[0]", "expected each CAN id once"],
    ),
    "firing order repeats a cylinder": (
        "firing_order = [1, 2]", "firing_order = [1, 1]", M1_INLINE,
        "engine.firing_order",
        ["[1, 1] does not name each of the 2 cylinders exactly once", "expected an ordering"],
    ),
    "firing order misses a cylinder": (
        "firing_order = [1, 2]", "firing_order = [2]", M1_INLINE, "engine.firing_order",
        ["[2] does not name each of the 2 cylinders", "expected an ordering of 1..2"],
    ),
    "missing >= teeth": (
        "missing = 2", "missing = 60", Larch, "wheel.missing",
        ["60 missing of 60 teeth", "expected fewer than teeth = 60"],
    ),
    "teeth < 2": (
        "teeth = 60", "teeth = 1", Larch, "wheel.teeth", ["got 1", "expected at least 2"],
    ),
    "tdc offset above 360": (
        "tdc_offset_deg = 96.0", "tdc_offset_deg = 400.0", Larch, "wheel.tdc_offset_deg",
        ["got 400.0", "expected crank degrees in 0..360"],
    ),
    "tdc offset negative": (
        "tdc_offset_deg = 96.0", "tdc_offset_deg = -5", Larch, "wheel.tdc_offset_deg",
        ["got -5", "expected crank degrees in 0..360"],
    ),
    "unknown cam mode": (
        'cam = "window"', 'cam = "dual"', Larch, "wheel.cam",
        ["got 'dual' (string)", "expected one of window, none"],
    ),
    "serial field beyond the frame": (
        "offset = 12", "offset = 15", Larch, "serial[0].field[4] (az)",
        ["bytes 15..16 run past the 16-byte frame", "expected offset <= 14 for i16"],
    ),
    "serial field over the sync": (
        "offset = 2", "offset = 1", Larch, "serial[0].field[0] (sequence)",
        ["bytes 1..2 overlap the sync (bytes 0..1)"],
    ),
    "serial field over the checksum": (
        "offset = 8", "offset = 14", Larch, "serial[0].field[2] (ax)",
        ["bytes 14..15 overlap the checksum (bytes 14..15)"],
    ),
    "checksum range outside the frame": (
        "end = 14,", "end = 17,", Larch, "serial[0].checksum (bar_left)",
        ["covers bytes 2..16", "expected 0 <= start < end <= frame_length = 16"],
    ),
    "checksum stored past the frame": (
        "at = 10 }", "at = 11 }", Alder, "serial[0].checksum.at (seat)",
        ["the 1-byte checksum at offset 11 runs past the 11-byte frame", "expected 0 <= at <= 10"],
    ),
    "unknown checksum kind": (
        'kind = "crc16-ccitt-false"', 'kind = "crc32"', Larch, "serial[0].checksum.kind (bar_left)",
        ["got 'crc32' (string)", "expected one of crc16-ccitt-false, sum8, xor8, none"],
    ),
    "sample rate zero": (
        "sample_rate_hz = 2000.0", "sample_rate_hz = 0.0", Larch,
        "serial[0].sample_rate_hz (bar_left)", ["got 0.0", "expected a value > 0"],
    ),
    "sensor without accel_z": (
        'role = "accel_z"', "", Larch, "serial[0].field (bar_left)",
        ["no field with role accel_z", "expected one field each for accel_x, accel_y and accel_z"],
    ),
    "unknown layout": (
        'layout = "twin-270"', 'layout = "twin-275"', Larch, "engine.layout",
        ["unknown layout 'twin-275'", "expected one of boxer-twin, four-cross, four-flat"],
    ),
    "conrod not longer than the crank radius": (
        "conrod_mm = 124.0", "conrod_mm = 31.0", Larch, "engine.conrod_mm",
        ["31 mm is not longer than the crank radius 31 mm", "expected conrod_mm > stroke_mm / 2"],
    ),
    "no tooth_periods signal": (
        'role = "tooth_periods"', "", Larch, "can.message",
        ["no signal has role 'tooth_periods'", "expected one array signal of crank tooth periods"],
    ),
    "cam window without a cam signal": (
        'role = "cam_level"', "", Larch, "wheel.cam",
        ["'window' but no signal has role 'cam_level'", "or cam = 'none'"],
    ),
    "left-handed axes": (
        'axes = ["forward", "left", "up"]', 'axes = ["forward", "right", "up"]', Larch,
        "serial[0].axes (bar_left)", ["left-handed frame", "expected a right-handed set"],
    ),
    "axes repeat an axis": (
        'axes = ["forward", "left", "up"]', 'axes = ["forward", "back", "up"]', Larch,
        "serial[0].axes (bar_left)", ["the same bike axis twice"],
    ),
    "unknown axis name": (
        'axes = ["forward", "left", "up"]', 'axes = ["forward", "left", "sky"]', Larch,
        "serial[0].axes (bar_left)", ["unknown direction 'sky'", "expected each of forward"],
    ),
    "layout and inline crank together": (
        'layout = "twin-270"', 'layout = "twin-270"\nstroke_cycle = 4', Larch,
        "engine.stroke_cycle", ["given together with layout = 'twin-270'", "not both"],
    ),
    "counter modulo beyond its bits": (
        "modulo = 16", "modulo = 32", Alder, "can.message[1].signal[5].modulo (alive)",
        ["32 exceeds what 4 bits can count", "expected at most 16"],
    ),
    "saturated raw value beyond its bits": (
        "saturated_raw = 0xFFFF", "saturated_raw = 0x1FFFF", Larch,
        "can.message[0].signal[2].saturated_raw (tooth_period)",
        ["131071 does not fit in 16 bits", "expected a raw value in 0..65535"],
    ),
    "classic frame longer than 8 bytes": (
        'length = 8\n\n  [[can.message.signal]]\n  name = "frame_counter"',
        'length = 12\n\n  [[can.message.signal]]\n  name = "frame_counter"', Larch,
        "can.message[0].length (crank_teeth)",
        ["12 data bytes", "expected one of 0, 1, 2, 3, 4, 5, 6, 7, 8 (classic CAN"],
    ),
    "checksum stored inside the bytes it covers": (
        "at = 14,", "at = 12,", Larch, "serial[0].checksum.at (bar_left)",
        ["the stored checksum (bytes 12..13) lies inside the bytes it covers"],
    ),
    "sensor name unusable in an environment variable": (
        'name = "bar_left"', 'name = "bar-left"', Larch, "serial[0].name (bar-left)",
        ["got 'bar-left' (string)", "expected letters, digits and _"],
    ),
    "firing_deg off the TDCs": (
        'layout = "twin-270"', 'layout = "twin-270"\nfiring_deg = [0.0, 300.0]', Larch,
        "engine.firing_deg",
        ["cylinder 2 fires at 300 deg, which is not one of its TDCs", "expected one of 270, 630"],
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_each_mistake_is_one_clear_line(tmp_path: Path, name: str) -> None:
    old, new, base, key, fragments = CASES[name]
    lines = problems(edited(tmp_path, old, new, base=base))
    prefix = f"{tmp_path / 'bad.toml'}: {key}: "
    assert len(lines) == 1, lines  # the one mistake, and no knock-on complaints
    assert lines[0].startswith(prefix), lines
    assert all(f in lines[0] for f in fragments), lines


def test_firing_order_the_crank_cannot_fire(tmp_path: Path) -> None:
    # dsp.layout.firing_angles raises InputError for an order the pins cannot fire; it must come
    # out as a RigError naming the file and key. Pins 0/90/270/180 with order 1-3-4-2: both TDCs
    # of cylinder 2 (90, 450) come before cylinder 4's later one (540), so 2 cannot follow 4.
    cross = """stroke_cycle = 4
firing_order = [1, 3, 4, 2]
  [[engine.cylinder]]
  pin_deg = 0.0
  position_mm = -110.0
  [[engine.cylinder]]
  pin_deg = 90.0
  position_mm = -37.0
  [[engine.cylinder]]
  pin_deg = 270.0
  position_mm = 37.0
  [[engine.cylinder]]
  pin_deg = 180.0
  position_mm = 110.0
"""
    base = Alder.replace('layout = "four-flat"', "")
    lines = problems(edited(tmp_path, "inertia_kgm2 = 0.012", "inertia_kgm2 = 0.012\n" + cross,
                            base=base))
    assert len(lines) == 1
    assert lines[0].startswith(f"{tmp_path / 'bad.toml'}: engine.firing_order: ")
    assert "[1, 3, 4, 2]" in lines[0]


def test_all_problems_are_listed_with_a_count(tmp_path: Path) -> None:
    text = Larch.replace("missing = 2", "missing = 60").replace('cam = "window"', 'cam = "dual"')
    path = tmp_path / "two.toml"
    path.write_text(text, encoding="utf-8")
    lines = problems(path)
    assert len(lines) == 2
    assert lines[0].startswith(f"{path}: wheel.missing: ")
    assert lines[1].startswith(f"{path}: wheel.cam: ")


def test_invalid_toml_names_line_and_column(tmp_path: Path) -> None:
    path = edited(tmp_path, "[limits]", "[limits\n")
    line_no = Larch[: Larch.index("[limits]")].count("\n") + 1
    with pytest.raises(RigError) as info:
        load_rig(path)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(f"{path}: line {line_no}, column ")  # tomllib's own position
    assert "not valid TOML" in msg


def test_missing_file_lists_presets() -> None:
    with pytest.raises(RigError) as info:
        load_rig("no-such-rig")
    assert str(info.value) == "no such rig file or preset 'no-such-rig' (presets: alder, larch)"


def test_unknown_key_in_layout_file(tmp_path: Path) -> None:
    layout = tmp_path / "odd.toml"
    layout.write_text('[engine]\nstroke_cycle = 4\nfiring_order = [1]\nbore = 80\n'
                      '[[engine.cylinder]]\npin_deg = 0.0\nposition_mm = 0.0\n', encoding="utf-8")
    rig = tmp_path / "rig.toml"
    rig.write_text(Larch.replace('layout = "twin-270"', 'layout = "odd.toml"'), encoding="utf-8")
    with pytest.raises(RigError) as info:
        load_rig(rig)
    # the layout path resolves beside the rig file, and the message names the layout file
    assert str(info.value).startswith(f"{layout}: engine: unknown key 'bore'")


def test_inline_engine_gives_the_same_engine_as_the_layout(tmp_path: Path) -> None:
    path = tmp_path / "inline.toml"
    path.write_text(M1_INLINE, encoding="utf-8")
    rig = load_rig(path)
    ref = load_rig("larch").engine
    assert rig.engine.pin_deg == ref.pin_deg and rig.engine.position_m == ref.position_m
    assert rig.engine.bore_m == ref.bore_m and rig.engine.firing_order == ref.firing_order


# --- bit layouts against cantools -------------------------------------------------------------


def ct_signals(sig: CanSignal) -> list[CtSignal]:
    order = "little_endian" if sig.byte_order == "little" else "big_endian"
    if sig.count == 1:
        return [CtSignal(sig.name, sig.start_bit, sig.length, byte_order=order)]
    # cantools has no arrays: element i is its own signal, i * length bits further along
    out = []
    for i in range(sig.count):
        if sig.byte_order == "little":
            start = sig.start_bit + i * sig.length
        else:  # continue the Motorola walk: position q = 8*byte + 7 - bit
            q = (sig.start_bit // 8) * 8 + 7 - sig.start_bit % 8 + i * sig.length
            start = (q // 8) * 8 + 7 - q % 8
        out.append(CtSignal(f"{sig.name}_{i}", start, sig.length, byte_order=order))
    return out


def cantools_bits(sig: CanSignal, length: int = 64) -> set[int]:
    """Bits cantools sets when every element is encoded as all ones (its own bit layout)."""
    elems = ct_signals(sig)
    msg = CtMessage(1, "m", length, elems, strict=True)
    data = msg.encode({e.name: 2**e.length - 1 for e in elems}, scaling=False)
    return {8 * i + b for i, byte in enumerate(data) for b in range(8) if byte >> b & 1}


LAYOUTS = [
    CanSignal("a", 0, 8), CanSignal("b", 8, 1), CanSignal("c", 16, 16, count=3),
    CanSignal("d", 3, 12), CanSignal("e", 7, 16, byte_order="big"),
    CanSignal("f", 15, 16, byte_order="big", count=3), CanSignal("g", 59, 4, byte_order="big"),
    CanSignal("h", 12, 10, byte_order="big"), CanSignal("i", 0, 64),
    CanSignal("j", 7, 64, byte_order="big"), CanSignal("k", 5, 3, byte_order="big", count=4),
]


@pytest.mark.parametrize("sig", LAYOUTS, ids=lambda s: s.name)
def test_occupied_bits_match_cantools(sig: CanSignal) -> None:
    assert occupied_bits(sig) == cantools_bits(sig)


def our_verdict(signals: list[CanSignal], length: int = 8) -> list[str]:
    problems = Problems("t.toml")
    msg = CanMessage("m", 0x10, False, length, tuple(signals))
    check_messages([(0, msg)], problems, fd=False)
    return problems.lines


def cantools_accepts(signals: list[CanSignal], length: int = 8) -> bool:
    elems = [e for s in signals for e in ct_signals(s)]
    try:
        CtMessage(0x10, "m", length, elems, strict=True)  # strict: raises on overlap / overflow
    except CantoolsError:
        return False
    return True


@pytest.mark.parametrize("a,b", list(itertools.combinations(LAYOUTS[:8], 2)))
def test_overlap_verdict_matches_cantools(a: CanSignal, b: CanSignal) -> None:
    assert (our_verdict([a, b]) == []) == cantools_accepts([a, b])


def test_pair_cases_hold_both_verdicts() -> None:
    verdicts = {cantools_accepts([a, b]) for a, b in itertools.combinations(LAYOUTS[:8], 2)}
    assert verdicts == {True, False}  # the pairs above include overlapping and clean layouts


@settings(max_examples=150, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(0, 63), st.integers(1, 24), st.sampled_from(["little", "big"]),
                  st.integers(1, 3)),
        min_size=1, max_size=3,
    ),
    st.integers(1, 8),
)
def test_random_layouts_agree_with_cantools(specs: list, length: int) -> None:
    sigs = [CanSignal(f"s{i}", sb, n, byte_order=bo, count=c)
            for i, (sb, n, bo, c) in enumerate(specs)]
    assert (our_verdict(sigs, length) == []) == cantools_accepts(sigs, length)


def test_shipped_rigs_are_valid_cantools_messages() -> None:
    for name in ("larch", "alder"):
        for msg in load_rig(name).messages:
            elems = [e for s in msg.signals for e in ct_signals(s)]
            CtMessage(msg.can_id, msg.name, msg.length, elems, strict=True,
                      is_extended_frame=msg.extended)


# --- configuration order ----------------------------------------------------------------------


def test_can_bus_flags_then_environment_then_file() -> None:
    rig = load_rig("larch")
    env = {"CRANKBEAT_CAN_INTERFACE": "virtual", "CRANKBEAT_CAN_CHANNEL": "vcan7",
           "CRANKBEAT_CAN_BITRATE": "500000"}
    assert resolve_can_bus(rig, env={}) == rig.can_bus  # file only
    from_env = resolve_can_bus(rig, env=env)
    assert (from_env.interface, from_env.channel, from_env.bitrate) == ("virtual", "vcan7", 500000)
    flags = resolve_can_bus(rig, interface="socketcand", channel="can0", bitrate=250000, env=env)
    assert (flags.interface, flags.channel, flags.bitrate) == ("socketcand", "can0", 250000)
    mixed = resolve_can_bus(rig, channel="vcan1", env={"CRANKBEAT_CAN_BITRATE": "125000"})
    assert (mixed.interface, mixed.channel, mixed.bitrate) == ("socketcan", "vcan1", 125000)


def test_bad_bitrate_in_environment() -> None:
    with pytest.raises(RigError, match=r"CRANKBEAT_CAN_BITRATE: got '1M', expected a positive"):
        resolve_can_bus(load_rig("larch"), env={"CRANKBEAT_CAN_BITRATE": "1M"})


def test_serial_port_flags_then_environment_then_file() -> None:
    sensor = load_rig("larch").sensor("bar_left")
    env = {"CRANKBEAT_SERIAL_BAR_LEFT": "socket://localhost:7777"}
    assert resolve_serial_port(sensor, env={}) == "/dev/ttyUSB0"
    assert resolve_serial_port(sensor, env=env) == "socket://localhost:7777"
    assert resolve_serial_port(sensor, port="loop://", env=env) == "loop://"


def test_serial_port_nowhere_given(tmp_path: Path) -> None:
    rig = load_rig(edited(tmp_path, 'port = "/dev/ttyUSB0"\n', ""))
    with pytest.raises(RigError, match="CRANKBEAT_SERIAL_BAR_LEFT"):
        resolve_serial_port(rig.sensors[0], env={})


# --- any bad value is a RigError, never a traceback -------------------------------------------

VALUE_LINE = r"^(\s*)([A-Za-z_]+) = (.+?)(\s+#.*)?$"


@pytest.mark.parametrize("base_name", ["larch", "alder"])
def test_every_key_with_a_wrong_value_gives_a_rig_error(tmp_path: Path, base_name: str) -> None:
    import re

    from crankbeat.logger.rig import parse_rig

    base = Larch if base_name == "larch" else Alder
    lines = base.splitlines()
    tried = 0
    for i, line in enumerate(lines):
        m = re.match(VALUE_LINE, line)
        if not m:
            continue
        for bad in ('"x"', "true", "-1", "0"):
            text = "\n".join(lines[:i] + [f"{m.group(1)}{m.group(2)} = {bad}"] + lines[i + 1:])
            tried += 1
            try:
                parse_rig(text, label="f.toml", source="test")
            except RigError as exc:
                assert all(ln.startswith("f.toml: ") for ln in str(exc).splitlines())
    assert tried > 200  # the loop really walked the file
