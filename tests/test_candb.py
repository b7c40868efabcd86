"""Rig CAN layouts from a CAN database: the same decode as the hand-written preset.

The database is written with cantools' own API (Database/Message/Signal, dumped as DBC), so the
reference for the bit layouts is cantools (a general-purpose CAN database library), not us.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from crankbeat.errors import RigError
from crankbeat.logger.rig import load_rig
from crankbeat.logger.stream import replay

cantools = pytest.importorskip("cantools")
from cantools.database.can import Database, Message, Signal  # noqa: E402
from cantools.database.conversion import BaseConversion  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
LARCH = ROOT / "logger" / "presets" / "larch.toml"
DEMO_LOG = ROOT / "fixtures" / "demo" / "demo.log"


def _sig(name, start, length, *, scale=1.0, offset=0.0, unit=None, signed=False,
         order="little_endian", **kw):
    conv = BaseConversion.factory(scale=scale, offset=offset)
    return Signal(name, start, length, byte_order=order, is_signed=signed, conversion=conv,
                  unit=unit, **kw)


def larch_database() -> Database:
    """The Larch's two frames as a CAN database (the bit layouts of presets/larch.toml)."""
    teeth = Message(0x0A0, "CRANK_TEETH", 8, [
        _sig("FRAME_COUNTER", 0, 8),
        _sig("CAM_LEVEL", 8, 1),
        *[_sig(f"TOOTH_PERIOD_{i}", 16 + 16 * i, 16, scale=0.25e-6, unit="s")
          for i in range(3)],
    ])
    status = Message(0x100, "ENGINE_STATUS", 8, [
        _sig("ENGINE_SPEED", 0, 16, scale=0.25, unit="rpm"),
        _sig("THROTTLE", 16, 8, scale=0.5, unit="%"),
        _sig("GEAR", 24, 8),
        _sig("COOLANT", 32, 8, offset=-40.0, unit="degC"),
        _sig("ROAD_SPEED", 40, 16, scale=0.01, unit="km/h"),
        _sig("STATUS_COUNTER", 56, 8),
    ], cycle_time=10)
    return Database(messages=[teeth, status])


DB_MESSAGES = """
[[can.message]]
name = "crank_teeth"
database_message = "CRANK_TEETH"

  [[can.message.signal]]
  name = "frame_counter"
  database_signal = "FRAME_COUNTER"
  role = "counter"
  modulo = 256

  [[can.message.signal]]
  name = "cam_level"
  database_signal = "CAM_LEVEL"
  role = "cam_level"

  [[can.message.signal]]
  name = "tooth_period"
  database_signal = ["TOOTH_PERIOD_0", "TOOTH_PERIOD_1", "TOOTH_PERIOD_2"]
  role = "tooth_periods"
  saturated_raw = 0xFFFF

[[can.message]]
name = "engine_status"
database_message = "ENGINE_STATUS"
id = 0x100
{status_signals}
"""

STATUS_SIGNALS = "".join(
    f'\n  [[can.message.signal]]\n  name = "{n}"\n  database_signal = "{d}"\n  role = "{r}"\n'
    for n, d, r in (("engine_speed", "ENGINE_SPEED", "engine_speed"),
                    ("throttle", "THROTTLE", "throttle"), ("gear", "GEAR", "gear"),
                    ("coolant", "COOLANT", "coolant"), ("road_speed", "ROAD_SPEED", "road_speed"),
                    ("status_counter", "STATUS_COUNTER", "counter"))
)


def write_db_rig(tmp: Path, *, messages: str | None = None, database: str = "larch.dbc",
                 db: Database | None = None) -> Path:
    """Larch's rig file with its CAN messages taken from a database file beside it."""
    (tmp / "larch.dbc").write_text((db or larch_database()).as_dbc_string())
    text = LARCH.read_text()
    head, rest = text.split("[[can.message]]", 1)
    serial = rest[rest.index("[[serial]]"):]
    head = head.replace('bitrate = 1000000', f'bitrate = 1000000\ndatabase = "{database}"')
    body = messages if messages is not None else DB_MESSAGES.format(
        status_signals=STATUS_SIGNALS)
    rig_path = tmp / "rig.toml"
    rig_path.write_text(head + body + "\n" + serial)
    return rig_path


def _decode_all(rig):
    teeth, status = [], []
    with replay(rig, DEMO_LOG, chunk_s=2.0) as stream:
        for chunk in stream:
            teeth.append(chunk.teeth)
            status.append(chunk.status)
    return teeth, status


def test_database_rig_decodes_the_demo_log_exactly_like_the_preset(tmp_path):
    db_rig = load_rig(write_db_rig(tmp_path))
    preset = load_rig("larch")
    # the layouts themselves: same bits, scales and roles (names are the rig's own)
    for a, b in zip(db_rig.messages, preset.messages):
        assert (a.can_id, a.extended, a.length) == (b.can_id, b.extended, b.length)
        assert [(s.start_bit, s.length, s.byte_order, s.signed, s.scale, s.offset, s.count,
                 s.role, s.saturated_raw, s.modulo) for s in a.signals] == \
               [(s.start_bit, s.length, s.byte_order, s.signed, s.scale, s.offset, s.count,
                 s.role, s.saturated_raw, s.modulo) for s in b.signals]
    assert db_rig.messages[1].rate_hz == pytest.approx(100.0)  # from the cycle time, 10 ms
    t_db, s_db = _decode_all(db_rig)
    t_pr, s_pr = _decode_all(preset)
    ft = np.concatenate([t.frame_time for t in t_db])
    assert len(ft) > 50_000  # the whole demo ride, not an empty decode
    for name in ("frame_time", "periods", "cam", "lost_before", "frame_index"):
        a = np.concatenate([getattr(t, name) for t in t_db])
        b = np.concatenate([getattr(t, name) for t in t_pr])
        np.testing.assert_array_equal(a, b)
    for role in ("engine_speed", "throttle", "gear", "coolant", "road_speed"):
        a = np.concatenate([s.values[role] for s in s_db])
        b = np.concatenate([s.values[role] for s in s_pr])
        np.testing.assert_array_equal(a, b)


def test_database_values_agree_with_cantools_own_decode(tmp_path):
    """One frame encoded by cantools decodes to cantools' own physical values through the rig."""
    from crankbeat.logger.can.bits import decode_signal

    db = larch_database()
    rig = load_rig(write_db_rig(tmp_path))
    values = {"ENGINE_SPEED": 4321.25, "THROTTLE": 37.5, "GEAR": 3, "COOLANT": 87.0,
              "ROAD_SPEED": 123.45, "STATUS_COUNTER": 201}
    payload = db.get_message_by_name("ENGINE_STATUS").encode(values)
    expect = db.decode_message("ENGINE_STATUS", payload)
    frame = np.frombuffer(payload, np.uint8)[None, :]
    msg = rig.messages[1]
    for sig, db_name in zip(msg.signals, values):
        assert decode_signal(frame, sig)[0] == pytest.approx(expect[db_name], abs=1e-9)


def test_big_endian_array_from_database(tmp_path):
    """Motorola signals (alder's style): the rig's array walk matches cantools' start bits."""
    teeth = Message(0x18FF10A0, "TEETH", 8, [
        _sig("CNT", 7, 8, order="big_endian"),
        *[_sig(f"P{i}", 15 + 16 * i, 16, scale=1e-6, order="big_endian") for i in range(3)],
        _sig("CAM", 63, 1, order="big_endian"),
    ], is_extended_frame=True)
    messages = """
[[can.message]]
name = "crank_teeth"
database_message = "TEETH"
  [[can.message.signal]]
  name = "cnt"
  database_signal = "CNT"
  role = "counter"
  [[can.message.signal]]
  name = "tooth_period"
  database_signal = ["P0", "P1", "P2"]
  role = "tooth_periods"
  [[can.message.signal]]
  name = "cam"
  database_signal = "CAM"
  role = "cam_level"
"""
    rig = load_rig(write_db_rig(tmp_path, messages=messages, db=Database(messages=[teeth])))
    from crankbeat.logger.can.bits import decode_signal

    msg = rig.messages[0]
    assert msg.extended and msg.can_id == 0x18FF10A0
    payload = teeth.encode({"CNT": 9, "P0": 0.001234, "P1": 0.002345, "P2": 0.000111,
                            "CAM": 1})
    got = decode_signal(np.frombuffer(payload, np.uint8)[None, :], msg.signals[1])[0]
    np.testing.assert_allclose(got, [0.001234, 0.002345, 0.000111], atol=1e-9)


@pytest.mark.parametrize("edit, expected", [
    (lambda m: m, "no such file"),
    (lambda m: m.replace('"CRANK_TEETH"', '"CRANK_TEETHX"'),
     "can.message[0] (crank_teeth).database_message: no message 'CRANK_TEETHX' in larch.dbc, "
     "expected one of CRANK_TEETH, ENGINE_STATUS"),
    (lambda m: m.replace('"CAM_LEVEL"', '"CAM"'),
     "can.message[0].signal[1] (cam_level).database_signal: no signal 'CAM' in message "
     "'CRANK_TEETH' of larch.dbc"),
    (lambda m: m.replace("id = 0x100", "id = 0x101"),
     "can.message[1] (engine_status).id: 257 but larch.dbc says 0x100 for 'ENGINE_STATUS', "
     "expected 0x100 (or leave id out)"),
    (lambda m: m.replace("id = 0x100", "length = 6"),
     "can.message[1] (engine_status).length: 6 but larch.dbc says 8"),
    (lambda m: m.replace('"TOOTH_PERIOD_1", "TOOTH_PERIOD_2"', '"TOOTH_PERIOD_2", '
                         '"TOOTH_PERIOD_1"'),
     "'TOOTH_PERIOD_2' starts at bit 48, expected element 1 right after the one before"),
    (lambda m: m.replace('database_signal = "GEAR"', 'database_signal = "GEAR"\n  length = 4'),
     "signal[2] (gear).length: given beside database_signal"),
])
def test_database_errors_are_one_line_naming_file_key_and_expectation(tmp_path, edit, expected):
    messages = edit(DB_MESSAGES.format(status_signals=STATUS_SIGNALS))
    database = "missing.dbc" if expected == "no such file" else "larch.dbc"
    rig_path = write_db_rig(tmp_path, messages=messages, database=database)
    with pytest.raises(RigError) as info:
        load_rig(rig_path)
    text = str(info.value)
    assert len(text.splitlines()) == 1, text
    assert text.startswith(f"{rig_path}: "), text
    assert expected in text, text
    assert "Traceback" not in text


def test_multiplexed_message_is_refused(tmp_path):
    mux = Message(0x0A0, "CRANK_TEETH", 8, [
        _sig("MUX", 0, 8, is_multiplexer=True),
        _sig("A", 8, 8, multiplexer_ids=[0], multiplexer_signal="MUX"),
        _sig("B", 8, 8, multiplexer_ids=[1], multiplexer_signal="MUX"),
    ])
    db = Database(messages=[mux, larch_database().get_message_by_name("ENGINE_STATUS")])
    rig_path = write_db_rig(tmp_path, db=db)
    with pytest.raises(RigError, match=r"database_message: message 'CRANK_TEETH' is multiplexed"):
        load_rig(rig_path)
