"""``crankbeat replay``: replay once by hash, --force, and a replay killed with SIGKILL.

The analysis itself belongs to ``logger.pipeline``; the tests that need it skip, saying so,
while it is missing. The replay-once check runs before the pipeline and is tested without it.
"""

from __future__ import annotations

import importlib.util
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.cli.main import main
from crankbeat.logger.store import Store, sha256_file

ROOT = Path(__file__).resolve().parent.parent
HAVE_PIPELINE = importlib.util.find_spec("crankbeat.logger.pipeline") is not None
needs_pipeline = pytest.mark.skipif(not HAVE_PIPELINE,
                                    reason="crankbeat.logger.pipeline has not landed yet")


DEMO = ROOT / "fixtures" / "demo"  # fixtures/README.md: the Larch's 60 s demo ride
SHORT = ROOT / "fixtures" / "blf"  # 2 s of the Larch in python-can's BLF format, no capture



@pytest.fixture(scope="module")
def short_ride():
    log = SHORT / "blf.blf"
    if not log.is_file():
        pytest.skip("fixtures/blf is missing (make fixtures)")
    return log, []


def _replay_argv(store: Path, log: Path, caps: list[Path], *extra: str, rig: str = "larch"
                 ) -> list[str]:
    argv = ["replay", "--rig", rig, "--can", str(log), "--store", str(store), *extra]
    for cap in caps:
        argv += ["--accel", str(cap)]
    return argv


def test_same_files_give_the_earlier_run_without_analysing(tmp_path, capsys):
    log = tmp_path / "ride.log"
    log.write_bytes(b"(0.000000) can0 100#0000000000000000\n")
    cap = tmp_path / "ride.bar_left.acraw"
    cap.write_bytes(b"ACCRAW1\n")
    db = tmp_path / "r.db"
    with Store.open(db) as st:
        earlier = fill_run(st, make_events(30), label="first",
                           sources=[(str(log), sha256_file(log), "can"),
                                    (str(cap), sha256_file(cap), "accel:bar_left")])
    code = main(_replay_argv(db, log, [cap], "--json"))
    out, err = capsys.readouterr()
    assert code == 0
    assert json.loads(out)["id"] == earlier
    assert f"analysed before as run {earlier}" in err
    with Store.open(db) as st:
        assert len(st.runs()) == 1
    # Another capture with the same CAN log is another set of files: not the earlier run.
    other = tmp_path / "other.bar_left.acraw"
    other.write_bytes(b"ACCRAW1\n\x00")
    code = main(_replay_argv(db, log, [other], "--json"))
    out, err = capsys.readouterr()
    if not HAVE_PIPELINE:
        assert code == 1 and "pipeline" in err and err.startswith("error: ")
    else:
        assert "analysed before" not in err
        if code == 0:  # a one-frame log analyses to an (empty) run of its own
            assert json.loads(out)["id"] != earlier
        else:
            assert err.startswith("error: ")


@needs_pipeline
def test_replay_twice_gives_one_run_unless_forced(tmp_path, capsys, short_ride):
    log, caps = short_ride
    db = tmp_path / "r.db"
    assert main(_replay_argv(db, log, caps, "--json", "--label", "first")) == 0
    first = json.loads(capsys.readouterr()[0])["id"]
    assert main(_replay_argv(db, log, caps, "--json")) == 0
    assert json.loads(capsys.readouterr()[0])["id"] == first
    assert main(_replay_argv(db, log, caps, "--json", "--force")) == 0
    forced = json.loads(capsys.readouterr()[0])["id"]
    assert forced != first
    with Store.open(db) as st:
        a, b = st.run(first), st.run(forced)
        assert a["status"] == b["status"] == "complete"
        # Replays are deterministic: the same files give the same events.
        ea, eb = st.events(first), st.events(forced)
    assert len(ea) > 0 and ea.tobytes() == eb.tobytes()
    assert {s["sha256"] for s in a["sources"]} == {sha256_file(p) for p in [log, *caps]}
    # The run's date is the ride's own start: the first receive time in the log, read with
    # python-can's own reader.
    from datetime import datetime

    import can

    with can.LogReader(str(log)) as reader:
        first = next(iter(reader)).timestamp
    started = datetime.fromisoformat(a["started_at"]).timestamp()
    assert abs(started - first) <= 2.0


def _count_events(db: Path) -> int:
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)
    except sqlite3.Error:
        return 0
    try:
        return conn.execute("SELECT COUNT(*) FROM events").fetchone()[0]
    except sqlite3.Error:
        return 0
    finally:
        conn.close()


@needs_pipeline
def test_killed_replay_leaves_an_incomplete_run_with_its_events(tmp_path, demo_ride):
    log, caps = demo_ride
    db = tmp_path / "killed.db"
    argv = [sys.executable, "-m", "crankbeat.logger.cli.main",
            *_replay_argv(db, log, caps, "--pace", "1", "--label", "killed")]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(argv, cwd=tmp_path, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    try:
        # Wait (not a timing check) until committed events show, then a little longer.
        deadline = time.monotonic() + 60.0
        while _count_events(db) == 0 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.2)
        time.sleep(1.5)
        assert proc.poll() is None, "the paced replay ended before it could be killed: " + \
            proc.stderr.read().decode(errors="replace")[-500:]
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    with Store.open(db, create=False) as st:
        (run,) = st.runs()
        assert run["status"] == "incomplete" and run["label"] == "killed"
        ev = st.events(run["id"])
    assert len(ev) > 0
    assert set(ev["cylinder"].tolist()) <= {1, 2}  # docs/rig.md: the Larch is a twin
    assert np.isfinite(ev["t"]).all()


@needs_pipeline
def test_query_commands_on_a_replayed_ride(tmp_path, capsys):
    """Any rig: the four-cylinder example (big-endian, 29-bit id, .asc log, a seat sensor)."""
    import csv
    import io

    folder = ROOT / "fixtures" / "alder"
    logs = sorted(folder.glob("*.asc"))
    if not logs:
        pytest.skip("fixtures/alder is missing (make fixtures)")
    caps = sorted(folder.glob("*.acraw"))
    db = tmp_path / "q.db"
    assert main(_replay_argv(db, logs[0], caps, "--label", "sim", rig="alder")) == 0
    out, _ = capsys.readouterr()
    assert out.startswith("run 1  [complete]  rig alder")
    assert "layout check: best fit" in out and "per cylinder" in out
    assert main(["runs", "--store", str(db), "--json"]) == 0
    (row,) = json.loads(capsys.readouterr()[0])
    assert main(["events", "sim", "--store", str(db)]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr()[0])))
    assert len(rows) == row["n_events"] > 0
    assert sum(int(r["misfire"]) for r in rows) == row["n_misfires"]
    assert {int(r["cylinder"]) for r in rows} == {1, 2, 3, 4}  # a four
    assert main(["trend", "misfire_rate", "--cylinder", "3", "--store", str(db), "--json"]) == 0
    (pt,) = json.loads(capsys.readouterr()[0])
    cyl3 = [r for r in rows if r["cylinder"] == "3" and r["verdict"] in ("fired", "misfire")]
    assert pt["n"] == len(cyl3)
    assert pt["value"] == pytest.approx(100 * sum(r["verdict"] == "misfire" for r in cyl3)
                                        / len(cyl3))
    assert main(["report", "last", "--store", str(db), "--out", str(tmp_path / "rep")]) == 0
    names = {p.name for p in (tmp_path / "rep").glob("*.png")}
    assert {"run1_metric.png", "run1_intervals.png", "run1_vibration.png",
            "run1_orders.png"} <= names
