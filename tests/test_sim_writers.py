"""Simulated rides on disk: python-can's readers, cantools' bit layouts, the CRC catalogue."""

from __future__ import annotations

import binascii
import hashlib
from pathlib import Path

import can
import cantools
import numpy as np
import pytest

from crankbeat.logger.rig import load_rig
from crankbeat.logger.serial.capture import CaptureReader
from crankbeat.logger.serial.parser import SerialFrameParser
from crankbeat.logger.sim import (
    CanSpec,
    Fault,
    Scenario,
    Segment,
    SerialSpec,
    build_frames,
    can_messages,
    read_truth,
    serial_chunks,
    simulate,
    write_can,
    write_ride,
)

Larch = load_rig("larch")
SC = Scenario(
    segments=(Segment(0.8, gear=0, rpm=(1300, 1300), throttle=(1, 1)),
              Segment(1.2, gear=2, rpm=(3000, 5000), throttle=(30, 40))),
    faults=(Fault("misfire", 2, probability=0.1),),
    can=CanSpec(unknown_ids=(0x3F0, 0x18FF0010), unknown_rate_hz=20.0),
    seed=9,
)


@pytest.fixture(scope="module")
def ride():
    return simulate(Larch, SC)


@pytest.fixture(scope="module")
def frames(ride):
    return build_frames(ride)


def _cantools_message(msg):
    """The rig's message as a cantools Message (array signals unrolled), the reference layout."""
    sigs = []
    for s in msg.signals:
        for i in range(s.count):
            if s.byte_order == "little":
                start = s.start_bit + i * s.length
            else:  # Motorola: element i starts i whole bytes later (sawtooth numbering)
                start = s.start_bit + 8 * (s.length // 8) * i
            sigs.append(cantools.database.can.Signal(
                name=f"{s.name}_{i}" if s.count > 1 else s.name, start=start, length=s.length,
                byte_order="little_endian" if s.byte_order == "little" else "big_endian",
                is_signed=s.signed, conversion=cantools.database.conversion.LinearConversion(
                    scale=s.scale, offset=s.offset, is_float=False)))
    return cantools.database.can.Message(frame_id=msg.can_id, name=msg.name, length=msg.length,
                                         signals=sigs, is_extended_frame=msg.extended, strict=True)


@pytest.mark.parametrize("fmt", [".log", ".asc", ".blf", ".csv", ".trc", ".log.gz", ".asc.gz"])
def test_python_can_reads_back_every_frame(ride, frames, tmp_path, fmt):
    # Reference: python-can's own LogReader for each format (the quirks: .asc
    # timestamps are relative to the first frame unless asked otherwise).
    path = write_can(ride, tmp_path / f"r{fmt}", frames=frames)
    with can.LogReader(path) as reader:
        msgs = list(reader)
    assert len(msgs) == len(frames)
    t = np.array([m.timestamp for m in msgs])
    ref = frames.t - frames.t[0] if fmt.startswith(".asc") else frames.t
    # .log/.csv print 6 decimals (our times are whole µs); .blf keeps ns from a ms-truncated
    # start; .trc keeps 0.1 µs of milliseconds; .asc keeps µs relative times.
    assert np.max(np.abs(t - ref)) < 1e-6
    assert [m.arbitration_id for m in msgs] == frames.can_id.tolist()
    assert [m.is_extended_id for m in msgs] == frames.extended.tolist()
    for i, m in enumerate(msgs):
        assert bytes(m.data) == frames.data[i, : frames.dlc[i]].tobytes()


def test_unwritable_formats_are_refused(ride, tmp_path):
    from crankbeat.errors import InputError

    for fmt in (".blf.gz", ".mf4", ".db"):
        with pytest.raises(InputError, match="CAN format"):
            write_ride(ride, tmp_path, can_format=fmt)


def test_tooth_frames_decode_with_cantools(ride, frames):
    # Reference bit layout: cantools, from the rig's signal definitions (docs/rig.md: three uint16
    # periods at 0.25 µs, oldest first, rolling counter in byte 0, cam in byte 1 bit 0).
    msg = Larch.message_for("tooth_periods")
    ref = _cantools_message(msg)
    sel = np.flatnonzero(frames.can_id == msg.can_id)
    dec = [ref.decode(frames.data[i, :8].tobytes()) for i in sel[:400]]
    periods = np.array([[d[f"tooth_period_{k}"] for k in range(3)] for d in dec])
    true = np.diff(ride.tooth_time)[: 3 * len(dec)].reshape(-1, 3)
    # a capture timer: each period within one LSB (0.25 µs), and the periods summed (edge stamps)
    # within half an LSB of the true elapsed time, however many are added (common practice)
    assert np.max(np.abs(periods - true)) <= 0.25e-6 + 1e-12
    drift = np.cumsum(periods.ravel() - true.ravel())
    assert np.max(np.abs(drift - drift[0])) <= 0.25e-6 + 1e-12
    counters = np.array([d["frame_counter"] for d in dec])
    assert np.all(np.diff(counters) % 256 == 1)
    cam = np.array([d["cam_level"] for d in dec])
    assert np.array_equal(cam, ride.tooth_cam[1:][2 : 3 * len(dec) : 3])
    # The gap period is about 3 of its neighbours (docs/rig.md, common practice for 60-2).
    teeth = ride.tooth_number[1 : 1 + 3 * len(dec)]
    p = true.ravel()
    gap = p[teeth == 0]
    ratio = gap / p[np.flatnonzero(teeth == 0) - 1]
    assert np.all((ratio > 2.5) & (ratio < 3.6))


def test_status_frames_decode_with_cantools(ride, frames):
    msg = Larch.message_for("engine_speed")
    ref = _cantools_message(msg)
    sel = np.flatnonzero(frames.can_id == msg.can_id)
    assert len(sel) == len(ride.status_t)
    dec = [ref.decode(frames.data[i, :8].tobytes()) for i in sel]
    rpm = np.array([d["engine_speed"] for d in dec])
    assert np.max(np.abs(rpm - ride.status["engine_speed"])) <= 0.125 + 1e-9
    gear = np.array([d["gear"] for d in dec])
    assert set(gear.tolist()) == {0, 2}
    coolant = np.array([d["coolant"] for d in dec])
    assert np.max(np.abs(coolant - ride.status["coolant"])) <= 0.5 + 1e-9


def test_frame_times_latency_and_foreign_ids(ride, frames):
    assert np.all(np.diff(frames.t) > 0)
    tooth = frames.kind == 0
    last_edges = ride.tooth_time[1:][2::3][: int(tooth.sum())]
    assert np.all(frames.t[tooth] >= np.round(last_edges + SC.can.latency_s, 6) - 1e-6)
    assert set(frames.can_id[frames.kind == 2].tolist()) == {0x3F0, 0x18FF0010}
    assert np.all(frames.extended[frames.can_id == 0x18FF0010])


def test_dropped_frames_leave_counter_gaps():
    sc = Scenario(segments=(Segment(1.0, gear=0, rpm=(2000, 2000), throttle=(3, 3)),), seed=3,
                  can=CanSpec(drop_probability=0.05))
    ride = simulate(Larch, sc)
    fr = build_frames(ride)
    all_teeth = len(ride.tooth_time[1:]) // 3
    sel = fr.kind == 0
    counter = fr.data[sel, 0].astype(int)
    gaps = (np.diff(counter) - 1) % 256
    assert 0 < gaps.sum() == all_teeth - sel.sum()


def test_live_iterators_match_the_files(ride, frames, tmp_path):
    live = list(can_messages(ride))
    assert [m.timestamp for m in live] == frames.t.tolist()
    paths = write_ride(ride, tmp_path)
    with CaptureReader(paths.captures["bar_left"]) as r:
        records = list(r)
    assert records == list(serial_chunks(ride, "bar_left"))


def test_capture_frames_carry_valid_crc_and_the_true_samples(ride, tmp_path):
    # CRC-16/CCITT-FALSE over bytes 2..13 (docs/rig.md); binascii.crc_hqx(data, 0xFFFF) computes it
    # (tests/reference/README.md: check value 0x29B1 over "123456789").
    assert binascii.crc_hqx(b"123456789", 0xFFFF) == 0x29B1
    paths = write_ride(ride, tmp_path)
    with CaptureReader(paths.captures["bar_left"]) as r:
        records = list(r)
    data = b"".join(d for _, d in records)
    acc = ride.accel["bar_left"]
    assert len(data) == 16 * len(acc.t)
    frames = np.frombuffer(data, np.uint8).reshape(-1, 16)
    assert np.all(frames[:, 0] == 0xA5) and np.all(frames[:, 1] == 0x5A)
    for f in frames[::97]:
        assert binascii.crc_hqx(f[2:14].tobytes(), 0xFFFF) == int(f[14]) | int(f[15]) << 8
    parser = SerialFrameParser(Larch.sensor("bar_left"))
    parsed = parser.push_records(records)
    assert len(parsed) == len(acc.t)
    assert np.allclose(parsed.accel, np.clip(np.rint(acc.xyz * 2048), -32768, 32767) / 2048)
    # Host times: monotonic, chunked every 1-16 ms (plus jitter), after the bytes were sent.
    host = np.array([t for t, _ in records])
    # (the scenario's reads: every 1-16 ms, jitter 1.5 ms rms; 30 ms is beyond any of them)
    assert np.all(np.diff(host) >= 0) and np.all(np.diff(host) < 0.030)
    assert np.all(parsed.host_time >= acc.t - 1e-12)


def test_device_clock_drifts_and_wraps():
    sc = Scenario(segments=(Segment(1.0, gear=0, rpm=(1300, 1300), throttle=(1, 1)),), seed=1,
                  serial=SerialSpec(drift_ppm=30.0, clock_offset_s=4294.5))
    ride = simulate(Larch, sc)
    acc = ride.accel["bar_left"]
    assert acc.device_raw.max() < 2**32 and np.any(np.diff(acc.device_raw) < 0)  # wrapped
    dev = np.unwrap(acc.device_raw.astype(float), period=2**32) * 1e-6
    slope = np.polyfit(acc.t - acc.t[0], dev, 1)[0]
    assert slope == pytest.approx(1 + 30e-6, abs=2e-9)
    assert np.all(acc.device_raw == np.rint(acc.device_raw))


def test_serial_faults_are_counted_by_the_parser():
    sc = Scenario(segments=(Segment(1.0, gear=0, rpm=(1300, 1300), throttle=(1, 1)),), seed=1,
                  serial=SerialSpec(corrupt_probability=0.01, lost_probability=0.01,
                                    start_offset=7))
    ride = simulate(Larch, sc)
    records = list(serial_chunks(ride, "bar_left"))
    parser = SerialFrameParser(Larch.sensor("bar_left"))
    parsed = parser.push_records(records)
    n = len(ride.accel["bar_left"].t)
    assert parser.counts.corrupt > 0 and parser.counts.lost > 0
    # 1 % of frames corrupt and 1 % hit by a run of up to 2 frames of lost bytes: a few % gone
    assert 0.95 * n < len(parsed) < n
    assert records[0][1][:2] != b"\xa5\x5a"  # starts mid-frame


def test_truth_csv_round_trip(ride, tmp_path):
    paths = write_ride(ride, tmp_path)
    back = read_truth(paths.truth)
    ev = ride.events
    assert len(back) == len(ev)
    assert np.allclose(back["t"], ev["t"], atol=1e-6)
    for name in ("cycle", "cylinder", "fired", "rough", "fuel_cut"):
        assert np.array_equal(back[name], ev[name])
    assert (~back["fired"]).sum() > 0


def _hashes(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


def test_files_regenerate_bit_for_bit(tmp_path):
    sc = Scenario(segments=(Segment(0.6, gear=1, rpm=(3000, 3500), throttle=(20, 20), rough=0.5),),
                  seed=21, serial=SerialSpec(corrupt_probability=0.002))
    for fmt, sub in ((".asc", "a"), (".asc", "b"), (".log.gz", "a"), (".log.gz", "b")):
        write_ride(simulate(Larch, sc), tmp_path / sub, can_format=fmt)
    assert _hashes(tmp_path / "a") == _hashes(tmp_path / "b")
    head = (tmp_path / "a" / "ride.asc").read_text().splitlines()[0]
    assert head.startswith("date ") and "2026" in head  # the scenario's start, not the clock
    other = simulate(Larch, Scenario(segments=sc.segments, seed=22))
    write_ride(other, tmp_path / "c", can_format=".asc")
    assert _hashes(tmp_path / "c")["ride.asc"] != _hashes(tmp_path / "a")["ride.asc"]


def test_any_rig_big_endian_extended_ids_36_minus_1(tmp_path):
    rig = load_rig("alder")
    sc = Scenario(segments=(Segment(1.0, gear=0, rpm=(3000, 3000), throttle=(10, 10)),), seed=2)
    ride = simulate(rig, sc)
    assert ride.tooth_number.max() == 34  # 36-1: 35 physical teeth
    assert np.all(ride.tooth_cam == -1)  # the rig has no cam
    fr = build_frames(ride)
    msg = rig.message_for("tooth_periods")
    ref = _cantools_message(msg)
    sel = np.flatnonzero(fr.can_id == msg.can_id)
    assert np.all(fr.extended[sel])
    dec = [ref.decode(fr.data[i, :8].tobytes()) for i in sel[:200]]
    periods = np.array([[d[f"tooth_period_{k}"] for k in range(3)] for d in dec])
    true = np.diff(ride.tooth_time)[: 3 * len(dec)].reshape(-1, 3)
    assert np.max(np.abs(periods - true)) <= 1e-6 + 1e-12  # one LSB of 1 µs (capture timer)
    drift = np.cumsum(periods.ravel() - true.ravel())
    assert np.max(np.abs(drift - drift[0])) <= 1e-6 + 1e-12  # edge stamps: no random walk
    paths = write_ride(ride, tmp_path, can_format=".blf")
    parser = SerialFrameParser(rig.sensor("seat"))
    with CaptureReader(paths.captures["seat"]) as r:
        parsed = parser.push_records(list(r))
    assert len(parsed) == len(ride.accel["seat"].t)


def test_status_roles_split_over_messages_at_their_own_rates(tmp_path):
    # Any rig: here coolant moves to its own 10 Hz message (29-bit id, big-endian).
    text = (Path(__file__).resolve().parent.parent / "logger/presets/larch.toml").read_text()
    block = text[text.index('  [[can.message.signal]]\n  name = "coolant"'):
                 text.index('  [[can.message.signal]]\n  name = "road_speed"')]
    text = text.replace(block, "")
    text = text.replace("[[serial]]", '''[[can.message]]
name = "temps"
id = 0x18FF2001
extended = true
length = 8
rate_hz = 10

  [[can.message.signal]]
  name = "coolant"
  start_bit = 7
  length = 8
  byte_order = "big"
  offset = -40.0
  role = "coolant"

[[serial]]''', 1)
    path = tmp_path / "split.toml"
    path.write_text(text)
    rig = load_rig(path)
    ride = simulate(rig, Scenario(segments=(Segment(1.0, gear=0, rpm=(1500, 1500),
                                                    throttle=(2, 2)),), seed=1))
    fr = build_frames(ride)
    temps = fr.can_id == 0x18FF2001
    assert temps.sum() == 10 and np.all(fr.extended[temps])
    assert (fr.can_id == 0x100).sum() == 100
    ref = _cantools_message(rig.message_for("coolant"))
    c = [ref.decode(fr.data[i, :8].tobytes())["coolant"] for i in np.flatnonzero(temps)]
    assert np.allclose(c, np.interp(fr.t[temps], ride.status_t, ride.status["coolant"]),
                       atol=1.0)


def test_live_frames_over_python_can_virtual_bus(ride, frames):
    # A live test feeds the ride through python-can's own virtual bus (a real interface).
    msgs = list(can_messages(ride))[:300]
    with can.Bus(interface="virtual", channel="sim-test", receive_own_messages=False) as tx, \
            can.Bus(interface="virtual", channel="sim-test") as rx:
        for m in msgs:
            tx.send(m)
        got = [rx.recv(timeout=1.0) for _ in msgs]
    assert all(g is not None for g in got)
    assert [g.arbitration_id for g in got] == frames.can_id[:300].tolist()
    assert [bytes(g.data) for g in got] == [bytes(m.data) for m in msgs]


def test_live_serial_chunks_through_pyserial_loop(ride):
    # pyserial's loop:// port passes the bytes through; reads of each chunk give them back.
    import serial

    chunks = list(serial_chunks(ride, "bar_left"))[:200]
    port = serial.serial_for_url("loop://", timeout=1.0, write_timeout=1.0)
    try:
        back = []
        for _, data in chunks:  # each chunk is far below loop://'s 4096-byte queue
            port.write(data)
            back.append(port.read(len(data)))
    finally:
        port.close()
    assert back == [d for _, d in chunks]
    parsed = SerialFrameParser(Larch.sensor("bar_left")).push_records(
        [(t, b) for (t, _), b in zip(chunks, back)])
    assert len(parsed) >= len(b"".join(back)) // 16 - 1
