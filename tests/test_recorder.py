"""Recorder: what goes in comes back out through python-can's readers and the capture reader."""

from __future__ import annotations

import can
import numpy as np
import pytest
from conftest import larch_frames, larch_serial

import crankbeat.logger.recorder as recorder_mod
from crankbeat.errors import UsageError
from crankbeat.logger.can.sources.base import FrameBatch
from crankbeat.logger.recorder import Recorder
from crankbeat.logger.serial.capture import CaptureReader


@pytest.mark.parametrize("suffix", [".log", ".asc", ".blf", ".csv"])
def test_frames_and_serial_reads_come_back(tmp_path, larch, suffix):
    msgs = larch_frames(larch, seconds=0.2, extra_ids=True)
    reads = larch_serial(larch, seconds=0.2) + [(1_767_225_600.5, b"")]  # b"": a link break
    with Recorder(tmp_path, larch, can_suffix=suffix, stem="x") as rec:
        rec.write_can(FrameBatch.from_messages(msgs[:50], range(50)))
        rec.write_can(msgs[50:])
        rec.write_serial("bar_left", reads)
    assert rec.can_path == tmp_path / f"x{suffix}"
    kw = {"relative_timestamp": False} if suffix == ".asc" else {}
    back = list(can.LogReader(str(rec.can_path), **kw))  # reference: python-can's reader
    assert len(back) == len(msgs)
    for a, b in zip(back, msgs, strict=True):
        assert (a.arbitration_id, bytes(a.data), a.is_extended_id) == (
            b.arbitration_id, bytes(b.data), b.is_extended_id)
    t_back = np.array([m.timestamp for m in back])
    t_want = np.array([m.timestamp for m in msgs])
    # .asc keeps its start date to the millisecond (python-can), the rest to the microsecond
    np.testing.assert_allclose(t_back, t_want, atol=1e-3 if suffix == ".asc" else 1e-6, rtol=0)
    with CaptureReader(rec.serial_paths["bar_left"]) as r:
        assert r.read() == reads


def test_data_reach_the_disk_before_close(tmp_path, larch, monkeypatch):
    monkeypatch.setattr(recorder_mod, "FLUSH_EVERY_S", 0.0)  # flush after every write
    msgs = larch_frames(larch, seconds=0.05)
    reads = larch_serial(larch, seconds=0.05)
    with Recorder(tmp_path, larch, stem="p") as rec:
        rec.write_can(msgs)
        rec.write_serial("bar_left", reads)
        # read while still open, as after a power cut: everything written is there
        assert len(list(can.LogReader(str(rec.can_path)))) == len(msgs)
        with CaptureReader(rec.serial_paths["bar_left"]) as r:
            assert r.read() == reads


def test_explicit_flush(tmp_path, larch):
    with Recorder(tmp_path, larch, stem="f") as rec:
        rec.write_can(larch_frames(larch, seconds=0.02))
        rec.flush()
        assert rec.can_path.read_text().count("\n") == rec.frames


def test_bad_requests(tmp_path, larch):
    with pytest.raises(UsageError, match="has no serial sensor 'seat'"):
        Recorder(tmp_path, larch, sensors=["seat"])
    with pytest.raises(UsageError, match="cannot record CAN as '.xyz'"):
        Recorder(tmp_path, larch, can_suffix=".xyz")
    with Recorder(tmp_path, larch, stem="b", sensors=[]) as rec:
        assert rec.serial_paths == {}
        with pytest.raises(UsageError, match="no serial sensor 'bar_left'"):
            rec.write_serial("bar_left", [(1.0, b"x")])
