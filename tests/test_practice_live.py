"""``crankbeat ride --rehearse``: a desk rehearsal through the real live path.

A recorded ride is played at its own pace onto python-can's virtual bus and, for the
accelerometer, through a local socket:// port; the ride records, analyses and stores it as on a
bike. The stored run must equal a replay of its own recording (live and replay are one code path,
DEVELOPERS.md "Data flow"); python-can reads the recording back frame for frame.
"""

from __future__ import annotations

import can
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.store import Store

REHEARSE_S = 3.0  # seconds of the ride played, at real speed


@pytest.fixture(scope="module")
def recorded_ride(tmp_path_factory):
    out = tmp_path_factory.mktemp("desk")
    assert main(["synth", "--rig", "larch", "--duration", "6", "--rpm", "4000", "--throttle", "30",
                 "--misfire-cylinder", "1", "--misfire-rate", "0.05", "--seed", "7",
                 "--out", str(out), "--quiet"]) == 0
    return out / "ride.log"


def test_rehearsal_of_a_recorded_ride_stores_what_a_replay_of_its_recording_gives(
        tmp_path, recorded_ride, capsys):
    db, rec = tmp_path / "desk.db", tmp_path / "rec"
    code = main(["ride", "--rig", "larch", "--rehearse", str(recorded_ride), "--rehearse-for",
                 f"{REHEARSE_S}", "--record", str(rec), "--store", str(db), "--plain"])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert "REHEARSAL" in err and "CAUTION: Ride only on a closed course" in out
    with Store.open(db, create=False) as st:
        (run,) = st.runs()
        live = st.events(run["id"])
    assert run["status"] == "complete" and len(live) > 0
    (log,) = sorted(rec.glob("*.log"))
    (cap,) = sorted(rec.glob("*.acraw"))
    with can.LogReader(str(log)) as reader:
        times = [m.timestamp for m in reader]
    assert 0.9 * REHEARSE_S < times[-1] - times[0] <= REHEARSE_S + 0.01  # the cut was kept
    assert main(["replay", "--rig", "larch", "--can", str(log), "--accel", str(cap),
                 "--store", str(db), "--json"]) == 0
    capsys.readouterr()
    with Store.open(db) as st:
        replayed = st.events(st.resolve_run("last"))
    assert replayed.tobytes() == live.tobytes()


def test_rehearsal_of_a_simulated_ride(tmp_path, capsys):
    db = tmp_path / "desk.db"
    code = main(["ride", "--rig", "larch", "--rehearse", "sim", "--rehearse-for", "2",
                 "--store", str(db), "--plain"])
    _, err = capsys.readouterr()
    assert code == 0, err
    with Store.open(db, create=False) as st:
        (run,) = st.runs()
        assert run["status"] == "complete" and len(st.events(run["id"])) > 0


def test_rehearsal_refuses_a_bus_or_port_of_its_own(recorded_ride, capsys):
    code = main(["ride", "--rig", "larch", "--rehearse", str(recorded_ride),
                 "--channel", "can0", "--store", "x.db"])
    assert code == 2 and "--rehearse plays its own bus" in capsys.readouterr().err
