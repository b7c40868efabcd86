"""FrameDecoder: frames laid out by cantools (an independent encoder) decode to the values put in;
every kind of damage is counted and noted with the frame's place, nothing else is lost."""

from __future__ import annotations

import dataclasses

import can
import cantools.database.can as cdb
import numpy as np
import pytest
from cantools.database.conversion import BaseConversion
from conftest import larch_frames

from crankbeat.logger.can.decode import FrameDecoder
from crankbeat.logger.can.sources.base import FrameBatch
from crankbeat.logger.rig.model import CanMessage

T0 = 1_767_225_600.0


def _cantools(msg: CanMessage) -> cdb.Message:
    """The rig's message as a cantools message (array signals as separate elements)."""
    sigs = []
    for sig in msg.signals:
        assert sig.byte_order == "little"
        for i in range(sig.count):
            sigs.append(cdb.Signal(
                sig.name if sig.count == 1 else f"{sig.name}{i}", sig.start_bit + i * sig.length,
                sig.length, byte_order="little_endian", is_signed=sig.signed,
                conversion=BaseConversion.factory(scale=sig.scale, offset=sig.offset)))
    return cdb.Message(msg.can_id, msg.name, msg.length, sigs)


def _batch(msgs: list[can.Message], first_line: int = 1) -> FrameBatch:
    return FrameBatch.from_messages(msgs, range(first_line, first_line + len(msgs)),
                                    origin="ride.log", index_kind="line")


def _tooth_msgs(rig, periods_s, counters, cams, t):
    ct = _cantools(rig.message_for("tooth_periods"))
    out = []
    for i, (p, c, cam) in enumerate(zip(periods_s, counters, cams, strict=True)):
        values = {"frame_counter": c, "cam_level": cam}
        values.update({f"tooth_period{k}": v for k, v in enumerate(p)})
        out.append(can.Message(timestamp=t[i], arbitration_id=ct.frame_id, is_extended_id=False,
                               data=ct.encode(values)))
    return out


def test_tooth_and_status_values_from_cantools_frames(larch):
    periods = [[2.0e-3, 2.05e-3, 6.1e-3], [1.0e-4, 1.25e-4, 16.3e-3]]
    msgs = _tooth_msgs(larch, periods, [254, 255], [1, 0], [T0, T0 + 0.01])
    st = _cantools(larch.message_for("engine_speed"))
    msgs.append(can.Message(timestamp=T0 + 0.02, arbitration_id=st.frame_id,
                            is_extended_id=False, data=st.encode({
                                "engine_speed": 3000.25, "throttle": 22.5, "gear": 3,
                                "coolant": 88, "road_speed": 61.37, "status_counter": 9})))
    dec = FrameDecoder(larch)
    teeth, status = dec.push(_batch(msgs))
    # the rig's unit is 0.25 us (docs/rig.md): values within half a step of what went in
    np.testing.assert_allclose(teeth.periods, periods, atol=0.125e-6)
    assert teeth.cam.tolist() == [1, 0] and teeth.lost_before.tolist() == [0, 0]
    assert teeth.frame_index.tolist() == [0, 1]
    assert status.t.tolist() == [T0 + 0.02]
    want = {"engine_speed": 3000.25, "throttle": 22.5, "gear": 3, "coolant": 88,
            "road_speed": 61.37}
    for role, v in want.items():
        assert status.values[role][0] == pytest.approx(v, abs=0.005)
    assert dec.health.can_frames == 3 and dec.health.notes == []


def test_saturated_period_is_nan(larch):
    # docs/rig.md: 0xFFFF (65535 x 0.25 us = 16.38375 ms) means saturated
    msgs = _tooth_msgs(larch, [[1e-3, 16.38375e-3, 1e-3]], [0], [0], [T0])
    teeth, _ = FrameDecoder(larch).push(_batch(msgs))
    assert np.isnan(teeth.periods[0, 1]) and not np.isnan(teeth.periods[0, 0])


def test_counter_gaps_are_lost_frames_and_wrap_is_not(larch):
    counters = [250, 251, 252, 255, 0, 1, 5]  # 253, 254 and 2..4 missing; 255 -> 0 wraps
    n = len(counters)
    msgs = _tooth_msgs(larch, [[1e-3] * 3] * n, counters, [0] * n, T0 + 0.001 * np.arange(n))
    dec = FrameDecoder(larch)
    teeth, _ = dec.push(_batch(msgs, first_line=10))
    assert teeth.lost_before.tolist() == [0, 0, 0, 2, 0, 0, 3]
    assert dec.health.can_lost_frames == 5
    assert dec.health.notes[0] == (
        "ride.log line 13: crank_teeth counter 252 -> 255: 2 frame(s) lost")


def test_state_carries_across_batches_identically(larch):
    msgs = larch_frames(larch, seconds=0.5, extra_ids=True)
    del msgs[100:103]  # a loss the counter must see across a batch boundary
    whole = FrameDecoder(larch)
    t_all, s_all = whole.push(_batch(msgs))
    split = FrameDecoder(larch)
    parts = [split.push(_batch(msgs[a:b], first_line=a + 1))
             for a, b in [(0, 1), (1, 101), (101, 102), (102, 777), (777, len(msgs))]]
    for f in dataclasses.fields(t_all):
        np.testing.assert_array_equal(
            np.concatenate([getattr(p[0], f.name) for p in parts]), getattr(t_all, f.name))
    for role, v in s_all.values.items():
        np.testing.assert_array_equal(np.concatenate([p[1].values[role] for p in parts]), v)
    assert dataclasses.asdict(split.health) == dataclasses.asdict(whole.health)
    assert whole.health.can_lost_frames >= 3


def test_unknown_error_remote_and_bad_length_are_counted_and_skipped(larch):
    good = larch_frames(larch, seconds=0.05)
    odd = [
        can.Message(timestamp=T0 + 0.0101, arbitration_id=0x555, is_extended_id=False, data=b"1"),
        can.Message(timestamp=T0 + 0.0102, is_error_frame=True),
        can.Message(timestamp=T0 + 0.0103, arbitration_id=0x0A0, is_extended_id=False,
                    is_remote_frame=True),
        can.Message(timestamp=T0 + 0.0104, arbitration_id=0x100, is_extended_id=False,
                    data=b"\x00" * 5),
        can.Message(timestamp=T0 + 0.0105, arbitration_id=0x0A0, is_extended_id=True,
                    data=b"\x00" * 8),  # same number, 29-bit: another id
    ]
    msgs = sorted(good + odd, key=lambda m: m.timestamp)
    dec = FrameDecoder(larch)
    teeth, status = dec.push(_batch(msgs))
    ref_t, ref_s = FrameDecoder(larch).push(_batch(good))
    np.testing.assert_array_equal(teeth.periods, ref_t.periods)
    np.testing.assert_array_equal(status.values["engine_speed"], ref_s.values["engine_speed"])
    h = dec.health
    assert (h.can_unknown_id, h.can_error_frames, h.can_remote_frames, h.can_bad_length) == (
        2, 1, 1, 1)
    line = {m.timestamp: i + 1 for i, m in enumerate(msgs)}
    notes = "\n".join(h.notes)
    assert f"ride.log line {line[T0 + 0.0101]}: id 0x555 is not in rig 'larch'" in notes
    assert f"ride.log line {line[T0 + 0.0105]}: id 0x000000A0 is not in rig" in notes
    assert (f"ride.log line {line[T0 + 0.0104]}: id 0x100 (engine_status) has 5 data bytes, "
            "expected 8") in notes
    assert f"ride.log line {line[T0 + 0.0102]}: CAN error frame" in notes


def test_backwards_time_and_silent_periodic_message(larch):
    msgs = larch_frames(larch, seconds=0.3)
    status = [m for m in msgs if m.arbitration_id == 0x100]
    late = [can.Message(timestamp=m.timestamp + 2.0, arbitration_id=0x100, is_extended_id=False,
                        data=m.data) for m in status[:3]]
    back = can.Message(timestamp=T0 + 0.1, arbitration_id=0x555, is_extended_id=False, data=b"")
    dec = FrameDecoder(larch)
    dec.push(_batch(msgs + late + [back]))
    h = dec.health
    assert h.can_time_jumps == 1  # the 100 Hz status message silent for ~1.7 s > 0.5 s
    assert h.can_time_backwards == 1
    assert any("engine_status (0x100, 100 Hz) silent for" in n for n in h.notes)
    assert any(f"line {len(msgs) + 4}: timestamp goes backwards" in n for n in h.notes)


def test_log_of_another_rig_says_so(larch):
    msgs = [can.Message(timestamp=T0 + i * 1e-3, arbitration_id=0x321, is_extended_id=False,
                        data=bytes(8)) for i in range(50)]
    dec = FrameDecoder(larch)
    teeth, status = dec.push(_batch(msgs))
    dec.finish()
    assert len(teeth) == 0 and len(status) == 0 and dec.health.can_unknown_id == 50
    assert dec.health.notes[-1] == (
        "ride.log: none of the first 50 frames has an id of rig 'larch' (expected 0x0A0, 0x100): "
        "is this the right rig for this log?")


def _with_teeth_signal(rig, **changes):
    msg = rig.message_for("tooth_periods")
    sigs = tuple(dataclasses.replace(s, **changes) if s.role == "tooth_periods" else s
                 for s in msg.signals)
    new = dataclasses.replace(msg, signals=sigs)
    return dataclasses.replace(rig, messages=tuple(new if m is msg else m
                                                   for m in rig.messages))


def test_wrong_byte_order_in_the_rig_is_noted(larch):
    msgs = larch_frames(larch, seconds=0.5)
    right = FrameDecoder(larch)
    right.push(_batch(msgs))
    right.finish()
    assert not any("implausible" in n for n in right.health.notes)
    # the same bytes read as Motorola (start bit 23 = MSB of byte 2): bytes swapped
    wrong = FrameDecoder(_with_teeth_signal(larch, byte_order="big", start_bit=23))
    wrong.push(_batch(msgs))
    wrong.finish()
    notes = [n for n in wrong.health.notes if "implausible" in n]
    assert len(notes) == 1 and notes[0].startswith("ride.log line ")
    assert "check byte order, scale and start bit of signal 'tooth_period'" in notes[0]


def test_cam_in_another_message_is_held(larch):
    teeth_msg = larch.message_for("tooth_periods")
    cam = teeth_msg.signal_for("cam_level")
    cam_msg = CanMessage("cam", 0x200, False, 1, (dataclasses.replace(cam, start_bit=0),))
    rig = dataclasses.replace(larch, messages=(
        dataclasses.replace(teeth_msg, signals=tuple(s for s in teeth_msg.signals if s is not cam)),
        *larch.messages[1:], cam_msg))
    msgs = larch_frames(larch, seconds=0.05)
    t_cam = msgs[20].timestamp + 1e-7
    msgs.insert(21, can.Message(timestamp=t_cam, arbitration_id=0x200, is_extended_id=False,
                                data=b"\x01"))
    dec = FrameDecoder(rig)
    parts = [dec.push(_batch(msgs[:10])), dec.push(_batch(msgs[10:]))]
    cam_levels = np.concatenate([p[0].cam for p in parts])
    t = np.concatenate([p[0].frame_time for p in parts])
    # before the first cam frame: unknown (-1); after it: its level, held
    assert (cam_levels[t < t_cam] == -1).all() and (cam_levels[t > t_cam] == 1).all()
    assert (t < t_cam).any() and (t > t_cam).any()
    assert dec.health.can_unknown_id == 0
