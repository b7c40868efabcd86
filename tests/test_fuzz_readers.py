"""Every reader, fed damaged recordings chosen by hypothesis, answers cleanly and keeps every
frame of the undamaged units.

CAN logs are damaged up to half their lines: a candump log whose first 20 lines are all
unreadable is refused as "not a candump log" by design (90 % damage gets there), see
logger/can/sources/candump_fast.py.

The damage and the reference readings are tests/fuzzkit.py's (the same as ``make fuzz``, which
runs over 10^6 damaged units): python-can's own reader on the undamaged lines or objects of a
log written by python-can; the capture records and serial frames as written. "Cleanly": frames,
or one crankbeat error of one line; never another exception.
"""

from __future__ import annotations

import logging
import random
import tempfile
from importlib import resources
from pathlib import Path

import pytest
from fuzzkit import CanBase, Tally, can_round, capture_round, rig_round, serial_round
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

SETTINGS = settings(max_examples=25, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])
CAN_FORMATS = ("candump-fast", "candump-python-can", "asc", "csv", "trc", "blf")


@pytest.fixture(scope="module")
def workdir():
    with tempfile.TemporaryDirectory() as d:
        yield Path(d)


@pytest.fixture(scope="module")
def bases(workdir):
    return {fmt: CanBase.make(random.Random(fmt), fmt, workdir, 400) for fmt in CAN_FORMATS}


@pytest.fixture(autouse=True)
def _quiet_python_can():
    logging.disable(logging.WARNING)  # python-can logs each line it cannot parse
    yield
    logging.disable(logging.NOTSET)


def _check(t: Tally) -> None:
    assert t.crashes == 0, t.examples
    assert t.clean == t.files
    assert t.kept == t.ref_frames, t.examples


@pytest.mark.parametrize("fmt", CAN_FORMATS)
@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), share=st.sampled_from([0.01, 0.1, 0.5]))
def test_can_log_readers_keep_every_undamaged_frame(bases, workdir, fmt, seed, share):
    _check(can_round(random.Random(seed), bases[fmt], workdir, share))


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), share=st.sampled_from([0.01, 0.05, 0.2]))
def test_capture_reader_keeps_every_undamaged_record(workdir, seed, share):
    _check(capture_round(random.Random(seed), workdir, 400, share))


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), share=st.sampled_from([0.01, 0.1, 0.5, 0.9]))
def test_serial_parser_keeps_every_undamaged_frame(seed, share):
    _check(serial_round(random.Random(seed), 500, share))


RIG = resources.files("crankbeat.logger.presets").joinpath("larch.toml").read_text("utf-8")


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_damaged_rig_file_loads_or_is_refused_in_one_line_naming_the_file(workdir, seed):
    _check(rig_round(random.Random(seed), workdir, RIG))


def test_a_zeroed_blf_block_is_skipped_not_padded(workdir):
    # python-can hands over fewer data bytes than the DLC for a zeroed block; those frames are
    # damaged records (skipped and counted), never frames padded with zeros
    import can

    from crankbeat.logger.can.sources import LogFileSource

    path = workdir / "z.blf"
    msgs = [can.Message(timestamp=1.7e9 + i * 1e-3, arbitration_id=0x0A0, data=bytes([i] * 8))
            for i in range(200)]
    with can.Logger(str(path), compression_level=0) as w:
        for m in msgs:
            w.on_message_received(m)
    raw = bytearray(path.read_bytes())
    raw[2000:2600] = bytes(600)
    path.write_bytes(bytes(raw))
    with LogFileSource(path) as src:
        frames = [m for b in src.batches() for m in b.to_messages()]
    assert src.bad_records >= 1 and src.notes
    assert all(len(m.data) == m.dlc == 8 and m.data[0] == m.data[7] for m in frames)
    assert len(frames) >= 200 - 600 // 48 - 2
