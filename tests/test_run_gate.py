"""A run is stored only when the input holds something the rig can analyse.

Inputs without crank frames (empty, blank, CR-only logs; logs of other buses written by
python-can's own writers; and, when ``CRANKBEAT_PEER_LOGS`` names a folder, every log in it)
are answered by one line and a data-problem exit, with no run in the store. An interrupted
replay is analysed again by the next one; a failed one leaves no run behind.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import can
import numpy as np
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.rig import load_rig
from crankbeat.logger.run_gate import ERROR_FRAMES, RunWatch, describe_no_crank, log_census
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"
SHORT = ROOT / "fixtures" / "blf" / "blf.blf"
#: exit code of a data problem (crankbeat/errors.py, DataError)
DATA_EXIT = 6


def _replay(db: Path, log: Path, *extra: str) -> list[str]:
    return ["replay", "--rig", "larch", "--can", str(log), "--store", str(db), *extra]


def _run_count(db: Path) -> int:
    if not db.exists():
        return 0
    with Store.open(db, create=False) as st:
        return len(st.runs())


@pytest.mark.parametrize("content", [b"", b"\n\n   \n\t\n", b"\r\r\r\r", b"\r\n\r\n"],
                         ids=["empty", "blank", "cr-only", "crlf-only"])
def test_logs_without_frames_give_one_line_and_no_run(tmp_path, capsys, content):
    log = tmp_path / "ride.log"
    log.write_bytes(content)
    db = tmp_path / "r.db"
    assert main(_replay(db, log)) == DATA_EXIT
    out, err = capsys.readouterr()
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("error: ") and "ride.log" in err
    assert "no CAN frames" in err
    assert _run_count(db) == 0


def _other_bus_messages(n: int = 300) -> list[can.Message]:
    # A bus of another vehicle: none of its ids is the Larch's crank frame (0x0A0, RIG.md).
    ids = [0x123, 0x3E8, 0x18FEF100, 0x7DF]
    return [can.Message(timestamp=1.0 + 0.001 * i, arbitration_id=ids[i % 4],
                        is_extended_id=ids[i % 4] > 0x7FF, data=bytes([i % 256] * 8))
            for i in range(n)]


@pytest.mark.parametrize("suffix", [".asc", ".blf", ".trc", ".csv", ".log"])
def test_log_of_another_bus_names_what_it_holds(tmp_path, capsys, suffix):
    log = tmp_path / f"other{suffix}"
    with can.Logger(str(log)) as writer:  # python-can's own writer for the format
        for msg in _other_bus_messages():
            writer.on_message_received(msg)
    db = tmp_path / "r.db"
    assert main(_replay(db, log)) == DATA_EXIT
    out, err = capsys.readouterr()
    assert err.count("\n") == 1
    assert ("no crank frames for id 0x0A0 among 300 frames of 4 other ids: is this rig "
            "'larch'?") in err
    assert _run_count(db) == 0
    # the census agrees with python-can's own reader of the file
    with can.LogReader(str(log)) as reader:
        ids = [m.arbitration_id for m in reader]
    assert log_census(log) == {k: ids.count(k) for k in set(ids)}


PEER = os.environ.get("CRANKBEAT_PEER_LOGS")


@pytest.mark.skipif(not PEER, reason="set CRANKBEAT_PEER_LOGS to a folder of other tools' logs")
def test_every_peer_log_gives_one_line_and_no_run(tmp_path, capsys):
    files = sorted(p for p in Path(PEER).iterdir() if p.suffix != ".md")
    assert files
    db = tmp_path / "r.db"
    for f in files:
        code = main(_replay(db, f))
        out, err = capsys.readouterr()
        assert code != 0 and err.count("\n") == 1 and str(f) in err, (f, code, err)
    assert _run_count(db) == 0


def test_description_of_a_crank_id_that_never_decodes():
    rig = load_rig("larch")
    text = describe_no_crank(rig, "x.log", lambda: {0x0A0: 12, 0x100: 3, ERROR_FRAMES: 2})
    assert "12 frames of crank id 0x0A0 but none could be read as tooth periods" in text
    assert describe_no_crank(rig, "x.log", lambda: {ERROR_FRAMES: 2}).startswith(
        "x.log: only 2 CAN error frame(s)")


def test_watch_counts_events_inside_an_accelerometer_break():
    from crankbeat.dsp.events import EVENT_DTYPE
    from crankbeat.logger.chunks import AccelBlock, Chunk, StatusBlock, StreamHealth

    rig = load_rig("larch")
    name = rig.sensors[0].name
    rate = rig.sensors[0].sample_rate_hz
    watch = RunWatch(rig)

    t1 = np.arange(0, 10, 1 / rate)  # 10 s of samples, then an unplug of 3 s, then 5 s more
    t2 = np.arange(13, 18, 1 / rate)
    ev = np.zeros(170, EVENT_DTYPE)
    ev["t"] = np.linspace(0.05, 17.95, 170)
    empty_teeth = _empty_teeth()
    for part, evs in ((t1, ev[:95]), (t2, ev[95:])):
        block = AccelBlock(name, part, np.zeros((len(part), 3)), np.r_[part[0] > 12,
                                                                      np.zeros(len(part) - 1,
                                                                               bool)])
        watch.push(Chunk(empty_teeth, StatusBlock(np.zeros(0), {}), {name: block},
                         StreamHealth(), float(part[-1])), evs)
    watch.finish(np.zeros(0, EVENT_DTYPE))
    (br,) = watch.breaks
    assert br.t_from == pytest.approx(t1[-1]) and br.t_to == pytest.approx(13.0)
    # samples missing: the gap's length times the board's rate, less the one sample at its end
    assert br.samples_missing == round((13.0 - t1[-1]) * rate) - 1
    inside = int(((ev["t"] > t1[-1]) & (ev["t"] < 13.0)).sum())
    assert inside > 0 and watch.events_without_accel == br.events == inside


def _empty_teeth():
    from crankbeat.logger.can.decode import FrameDecoder

    return FrameDecoder(load_rig("larch")).empty_teeth()


def _wait_for_events(db: Path, proc, limit_s: float = 60.0) -> None:
    import sqlite3

    deadline = time.monotonic() + limit_s
    while proc.poll() is None and time.monotonic() < deadline:
        try:
            conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)
            try:
                if conn.execute("SELECT COUNT(*) FROM events").fetchone()[0]:
                    return
            finally:
                conn.close()
        except sqlite3.Error:
            pass
        time.sleep(0.2)


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupted_replay_is_analysed_again_next_time(tmp_path, demo_ride, sig):
    log, caps = demo_ride
    db = tmp_path / "r.db"
    argv = [sys.executable, "-m", "crankbeat.logger.cli.main",
            # at real time, so that the ride is far from its end when the signal comes, however
            # slowly a loaded machine gets to the first stored events (at 4x the 60 s ride could
            # end within the second after them, and a finished run rightly exits 0)
            *_replay(db, log, "--pace", "1"), *[a for c in caps for a in ("--accel", str(c))]]
    # a shell's background job inherits SIGINT ignored (and then so would the replay): the child
    # gets the default back, as a command in a terminal has it
    proc = subprocess.Popen(argv, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    try:
        _wait_for_events(db, proc)
        time.sleep(1.0)
        assert proc.poll() is None, proc.stderr.read().decode(errors="replace")[-500:]
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode != 0
    assert b"Traceback" not in err
    with Store.open(db, create=False) as st:
        (run,) = st.runs()
        assert run["status"] == "interrupted" and run["n_events"] > 0
    # the next replay analyses the files again (not "analysed before"), replacing that run
    code = main([*_replay(db, log), *[a for c in caps for a in ("--accel", str(c))]])
    assert code == 0
    with Store.open(db, create=False) as st:
        (again,) = st.runs()
    assert again["status"] == "complete" and again["id"] != run["id"]
    assert again["n_events"] > run["n_events"]


def test_failed_replay_leaves_no_run(tmp_path, capsys):
    if not SHORT.is_file():
        pytest.skip("fixtures/blf is missing (make fixtures)")
    db = tmp_path / "r.db"
    cap = tmp_path / "bad.acraw"
    cap.write_bytes(b"this is no capture file at all\n" * 10)
    code = main(_replay(db, SHORT, "--accel", str(cap)))
    err = capsys.readouterr()[1]
    assert code != 0 and err.startswith("error: "), err
    assert _run_count(db) == 0
