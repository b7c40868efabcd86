"""Shipped presets: every rig and layout loads, larch is the reference rig."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.layout import balance_table, firing_intervals, firing_sequence
from crankbeat.errors import RigError
from crankbeat.logger.rig import list_layouts, list_presets, load_layout, load_rig, occupied_bits


@pytest.mark.parametrize("name", list_presets())
def test_every_rig_preset_loads(name: str) -> None:
    rig = load_rig(name)
    assert rig.source == f"preset:{name}" and rig.name == name
    assert rig.message_for("tooth_periods") is not None


@pytest.mark.parametrize("name", list_layouts())
def test_every_layout_loads(name: str) -> None:
    engine = load_layout(name)
    assert engine.name == name
    assert np.isclose(firing_intervals(engine).sum(), engine.cycle_deg)


def test_presets_load_from_any_working_directory(tmp_path: Path) -> None:
    # presets come from the package (importlib.resources), not from the current directory
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        assert load_rig("larch").engine.name == "twin-270"
    finally:
        os.chdir(here)


def test_shipped_lists() -> None:
    assert {"larch", "alder"} <= set(list_presets())
    assert {"single", "twin-360", "twin-180", "twin-270", "vtwin-90", "boxer-twin",
            "twin-180-2stroke", "triple-240", "four-flat", "four-cross"} <= set(list_layouts())


def test_unknown_layout_lists_the_known_ones() -> None:
    with pytest.raises(RigError, match=r"unknown layout 'v-twin', expected one of boxer-twin, "):
        load_layout("v-twin")


# --- larch is the reference rig of docs/rig.md ------------------------------------------


def test_m1_engine_is_rig_md() -> None:
    e = load_rig("larch").engine
    # docs/rig.md, engine: pins 0/270, bore 84, stroke 62, con-rod 124 mm, 0.42 kg, 0.021 kg·m²
    assert e.stroke_cycle == 4 and e.pin_deg == (0.0, 270.0) and e.firing_order == (1, 2)
    assert (e.bore_m, e.stroke_m, e.conrod_m) == pytest.approx((0.084, 0.062, 0.124))
    assert (e.recip_mass_kg, e.inertia_kgm2) == pytest.approx((0.42, 0.021))
    # docs/rig.md: cylinder 2 fires 270° after cylinder 1, cylinder 1 again 450° later
    assert firing_intervals(e).tolist() == pytest.approx([270.0, 450.0])


def test_m1_wheel_limits_and_bus_are_rig_md() -> None:
    rig = load_rig("larch")
    # docs/rig.md: 60-2 wheel, TDC 96° after tooth 0's falling edge, one-window cam, active level 1
    w = rig.wheel
    assert (w.teeth, w.missing, w.real_teeth, w.tdc_offset_deg) == (60, 2, 58, 96.0)
    assert (w.cam, w.cam_active_level) == ("window", 1)
    # docs/rig.md: idle 1300 rpm, rev limit 10 500 rpm
    assert (rig.limits.idle_rpm, rig.limits.rev_limit_rpm) == (1300.0, 10500.0)
    # docs/rig.md: classic CAN, 11-bit ids, 1 Mbit/s
    assert rig.can_bus.bitrate == 1_000_000 and not rig.can_bus.fd
    assert all(not m.extended and m.length == 8 for m in rig.messages)


def byte_bits(first: int, last: int) -> set[int]:
    return set(range(8 * first, 8 * last + 8))


def test_m1_crank_frame_is_rig_md() -> None:
    msg = load_rig("larch").message_for("tooth_periods")
    assert msg is not None and msg.can_id == 0x0A0  # docs/rig.md table, id 0x0A0
    counter, cam, teeth = (msg.signal_for(r) for r in ("counter", "cam_level", "tooth_periods"))
    # docs/rig.md: byte 0 rolling counter 0..255; byte 1 bit 0 cam; bytes 2..7 three uint16 periods
    assert occupied_bits(counter) == byte_bits(0, 0) and counter.modulo == 256
    assert occupied_bits(cam) == {8}
    assert occupied_bits(teeth) == byte_bits(2, 7) and teeth.count == 3
    # docs/rig.md: unit 0.25 µs, 0xFFFF saturated, little-endian (Intel), unsigned
    assert teeth.scale == pytest.approx(0.25e-6) and teeth.saturated_raw == 0xFFFF
    assert teeth.byte_order == "little" and not teeth.signed


def test_m1_status_frame_is_rig_md() -> None:
    msg = load_rig("larch").message_for("engine_speed")
    assert msg is not None and msg.can_id == 0x100 and msg.rate_hz == 100  # docs/rig.md: 100 Hz
    # docs/rig.md row 0x100: (role, bytes, scale, offset)
    table = {
        "engine_speed": ((0, 1), 0.25, 0.0),
        "throttle": ((2, 2), 0.5, 0.0),
        "gear": ((3, 3), 1.0, 0.0),
        "coolant": ((4, 4), 1.0, -40.0),
        "road_speed": ((5, 6), 0.01, 0.0),
        "counter": ((7, 7), 1.0, 0.0),
    }
    for role, ((first, last), scale, offset) in table.items():
        sig = msg.signal_for(role)
        assert sig is not None, role
        assert occupied_bits(sig) == byte_bits(first, last), role
        assert (sig.scale, sig.offset) == pytest.approx((scale, offset)), role


def test_m1_accelerometer_is_rig_md() -> None:
    s = load_rig("larch").sensors[0]
    # docs/rig.md "Serial accelerometer": 921 600 baud, 2000 samples/s, 16-byte frames, sync A5 5A
    assert (s.baud, s.sample_rate_hz, s.frame_length, s.sync) == (921600, 2000.0, 16, b"\xa5\x5a")
    # docs/rig.md: left handlebar clamp; axes x forward, y left, z up
    assert s.location == "bar" and s.axes == ("forward", "left", "up")
    # docs/rig.md byte table: (role, offset, dtype); all LE; ax..az 1/2048 g per bit
    for role, offset, dtype in (("sequence", 2, "u16"), ("device_time", 4, "u32"),
                                ("accel_x", 8, "i16"), ("accel_y", 10, "i16"),
                                ("accel_z", 12, "i16")):
        f = s.field_for(role)
        assert f is not None and (f.offset, f.dtype, f.byte_order) == (offset, dtype, "little")
    assert s.field_for("accel_y").scale == 1 / 2048  # type: ignore[union-attr]
    # docs/rig.md: device time µs, wraps at 2**32; sequence +1 per frame, wraps at 2**16
    assert (s.device_time_unit_s, s.device_time_modulo, s.sequence_modulo) == (1e-6, 2**32, 2**16)
    # docs/rig.md: CRC-16/CCITT-FALSE over bytes 2..13, stored LE at 14..15
    c = s.checksum
    assert (c.kind, c.start, c.end, c.at, c.byte_order) == ("crc16-ccitt-false", 2, 14, 14,
                                                            "little")


def test_example_four_is_the_rig_it_claims() -> None:
    rig = load_rig("alder")
    assert "Alder" in rig.description and rig.engine.n_cylinders == 4
    teeth = rig.message_for("tooth_periods")
    assert teeth is not None and teeth.extended and teeth.can_id > 0x7FF  # a 29-bit id
    assert all(s.byte_order == "big" for m in rig.messages for s in m.signals)
    assert (rig.wheel.teeth, rig.wheel.missing, rig.wheel.cam) == (36, 1, "none")
    assert rig.sensors[0].checksum.kind == "sum8"
    assert rig.message_for("cam_level") is None


# --- layouts fire and shake as the trade says ------------------------------------------------

# Firing intervals of common layouts (common practice
# lists the twins, the triple and both fours). V-twins with one shared pin: 360 ± V angle.
INTERVALS = {
    "single": [720],
    "twin-360": [360, 360],
    "twin-180": [180, 540],
    "twin-270": [270, 450],
    "vtwin-90": [270, 450],  # "the same as a 90° V-twin"
    "vtwin-60": [300, 420],
    "boxer-twin": [360, 360],
    "twin-180-2stroke": [180, 180],
    "triple-240": [240, 240, 240],
    "four-flat": [180, 180, 180, 180],
    "four-cross": [90, 180, 270, 180],
}


def rotations(seq: list[float]) -> list[list[float]]:
    return [list(seq[k:]) + list(seq[:k]) for k in range(len(seq))]


@pytest.mark.parametrize("name", sorted(INTERVALS))
def test_layout_intervals_are_common_practice(name: str) -> None:
    got = firing_intervals(load_layout(name)).round(6).tolist()
    assert got in rotations([float(v) for v in INTERVALS[name]]), got


def test_cross_plane_four_fires_in_its_order() -> None:
    cyls, angles = firing_sequence(load_layout("four-cross"))
    # pins 0/90/270/180: cylinder k's TDCs are its pin angle and pin + 360 (common practice)
    assert cyls.tolist() == [1, 3, 2, 4]
    assert angles.tolist() == [0.0, 270.0, 450.0, 540.0]


@pytest.mark.parametrize("name", [n for n in INTERVALS if len(load_layout(n).pin_deg) > 1])
def test_cylinder_spacing_is_buildable(name: str) -> None:
    e = load_layout(name)
    pos = np.sort(np.asarray(e.position_m))
    if all(b == 0 for b in e.bank_deg):
        # inline: neighbouring bores cannot overlap, so centres are at least a bore apart
        assert np.all(np.diff(pos) > e.bore_m)
    else:
        # V and boxer: rods side by side on the crank, offset less than a bore
        assert 0 < np.ptp(pos) < e.bore_m


def term(name: str, order: int, kind: str):
    e = load_layout(name)
    (t,) = [t for t in balance_table(e, orders=(order,)) if t.kind == kind]
    return t, e.recip_mass_kg * e.crank_radius_m, e.rod_ratio


def test_balance_facts_of_the_layouts() -> None:
    # common practice: a 360° twin shakes like a single of twice the mass (primary 2 m r)
    t, mr, _ = term("twin-360", 1, "force")
    assert t.magnitude == pytest.approx(2 * mr, rel=1e-6)
    # a 180° twin and a flat four cancel the primary force
    assert term("twin-180", 1, "force")[0].magnitude == 0
    assert term("four-flat", 1, "force")[0].magnitude == 0
    # the flat four's secondaries add: 4 m r λ (common practice)
    t, mr, lam = term("four-flat", 2, "force")
    assert t.magnitude == pytest.approx(4 * mr * lam, rel=1e-6)
    # a 90° V-twin's primary is a constant rotating m r, which a counterweight cancels
    t, mr, _ = term("vtwin-90", 1, "force")
    assert t.rotating and t.magnitude == pytest.approx(mr, rel=1e-6)
    # the triple and the cross-plane four cancel primary and secondary forces, not the couples
    for name in ("triple-240", "four-cross"):
        assert term(name, 1, "force")[0].magnitude == 0
        assert term(name, 2, "force")[0].magnitude == 0
        assert term(name, 1, "couple")[0].magnitude > 0
    # an opposed twin cancels the primary force but leaves a rocking couple
    assert term("boxer-twin", 1, "force")[0].magnitude == 0
    assert term("boxer-twin", 1, "couple")[0].magnitude > 0
