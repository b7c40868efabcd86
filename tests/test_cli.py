"""The crankbeat command line: help of every command, query commands, error lines, exit codes."""

from __future__ import annotations

import csv
import importlib
import io
import json
import re

import numpy as np
import pytest
from test_store_fill import counts, fill_run, make_events

from crankbeat.dsp.events import VERDICT_NAMES
from crankbeat.logger.cli.main import COMMANDS, OPTIONAL, main
from crankbeat.logger.store import Store


def run_cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def store(tmp_path):
    """A store with two runs of the synthetic twin; returns (path, ids, events)."""
    path = tmp_path / "cli.db"
    ev_a = make_events(600, misfire_every={2: 30}, seed=4)
    ev_b = make_events(600, misfire_every={2: 10}, interval_offset={1: -1.5}, seed=5)
    with Store.open(path) as st:
        a = fill_run(st, ev_a, label="before", odometer_km=500.0,
                     started_at="2026-03-01T07:00:00+00:00",
                     vibration=[{"sensor": "bar_left", "rpm_lo": 5000, "rpm_hi": 5500,
                                 "axis": "sum", "weighting": "Wh", "rms": 6.0, "n": 100}])
        b = fill_run(st, ev_b, label="after", odometer_km=900.0,
                     started_at="2026-03-02T07:00:00+00:00",
                     vibration=[{"sensor": "bar_left", "rpm_lo": 5000, "rpm_hi": 5500,
                                 "axis": "sum", "weighting": "Wh", "rms": 7.5, "n": 100},
                                {"sensor": "bar_left", "rpm_lo": None, "rpm_hi": None,
                                 "axis": "sum", "weighting": "Wh", "rms": 5.0, "n": 900}])
        st.add_intervals(b, [{"from_cyl": 1, "to_cyl": 2, "expected_deg": 270.0,
                              "observed_deg": 270.2, "stderr_deg": 0.05, "n": 590, "flagged": 0},
                             {"from_cyl": 2, "to_cyl": 1, "expected_deg": 450.0,
                              "observed_deg": 448.5, "stderr_deg": 0.05, "n": 590,
                              "flagged": 0}])
        st.commit()
    return path, {"a": a, "b": b}, {"a": ev_a, "b": ev_b}


def _modules():
    out = []
    for name in COMMANDS:
        try:
            out.append(importlib.import_module(name))
        except ModuleNotFoundError:
            assert name in OPTIONAL, name
    return out


@pytest.mark.parametrize("mod", _modules(), ids=lambda m: m.NAME)
def test_every_command_has_help_with_an_example(capsys, mod):
    code, out, err = run_cli(capsys, mod.NAME, "--help")
    assert code == 0
    assert f"crankbeat {mod.NAME}" in out
    assert re.search(r"examples?:\s+crankbeat " + mod.NAME, out)
    assert mod.HELP.split()[0] in out
    assert "\n" not in mod.HELP


def test_top_level_help_lists_each_command_once(capsys):
    code, out, _ = run_cli(capsys, "--help")
    assert code == 0
    text = " ".join(out.split())  # argparse wraps long help lines
    for mod in _modules():
        assert f"{mod.NAME} {' '.join(mod.HELP.split())}" in text


def test_no_command_is_a_usage_error(capsys):
    code, _, err = run_cli(capsys)
    assert code == 2 and "COMMAND" in err


def test_runs_text_and_json(capsys, store):
    path, ids, evs = store
    code, out, _ = run_cli(capsys, "runs", "--store", str(path))
    assert code == 0
    lines = out.strip().splitlines()
    assert lines[0].split()[:3] == ["id", "rig", "started"]
    assert "before" in lines[1] and "after" in lines[2]
    code, out, _ = run_cli(capsys, "runs", "--store", str(path), "--json")
    rows = json.loads(out)
    assert [r["id"] for r in rows] == [ids["a"], ids["b"]]
    assert rows[1]["n_misfires"] == counts(evs["b"], 2)[0] + counts(evs["b"], 1)[0]
    code, out, _ = run_cli(capsys, "runs", "--store", str(path), "--rig", "other")
    assert code == 0 and "no runs of rig 'other'" in out


def test_store_from_environment_and_working_directory(capsys, store, monkeypatch, tmp_path):
    path, _, _ = store
    monkeypatch.setenv("CRANKBEAT_STORE", str(path))
    code, out, _ = run_cli(capsys, "runs")
    assert code == 0 and "before" in out
    monkeypatch.delenv("CRANKBEAT_STORE")
    monkeypatch.chdir(path.parent)
    path.rename(path.parent / "crankbeat.db")
    for suffix in ("-wal", "-shm"):
        side = path.parent / (path.name + suffix)
        if side.exists():
            side.rename(path.parent / ("crankbeat.db" + suffix))
    code, out, _ = run_cli(capsys, "show", "after")
    assert code == 0 and "run 2" in out


def test_show_text_has_cylinders_intervals_and_vibration(capsys, store):
    path, ids, evs = store
    code, out, _ = run_cli(capsys, "show", "last", "--store", str(path))
    assert code == 0
    assert f"run {ids['b']}  [complete]  rig larch" in out
    mis, counted = counts(evs["b"], 2)
    head = next(line for line in out.splitlines() if line.split()[:2] == ["cyl", "events"])
    row = next(line for line in out.splitlines() if line.split()[:1] == ["2"])
    cells = dict(zip(head.replace("rate %", "rate").split(), row.split(), strict=False))
    assert int(cells["misfires"]) == mis
    assert float(cells["rate"]) == pytest.approx(100 * mis / counted, abs=0.01)
    assert "firing intervals" in out and "448.50" in out
    assert "bar_left" in out and "7.500" in out
    assert "note: synthetic" in out  # the rest of the summary JSON


def test_show_json_is_one_object_with_the_counts(capsys, store):
    path, ids, evs = store
    code, out, _ = run_cli(capsys, "show", str(ids["a"]), "--store", str(path), "--json")
    obj = json.loads(out)
    assert obj["id"] == ids["a"]
    cyl2 = next(c for c in obj["cylinders"] if c["cylinder"] == 2)
    assert cyl2["misfires"] == counts(evs["a"], 2)[0] == 20  # every 30th of 600 cycles


def test_events_csv_has_every_event_and_reads_back(capsys, store):
    path, ids, evs = store
    code, out, _ = run_cli(capsys, "events", "before", "--store", str(path))
    assert code == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    ev = evs["a"]
    assert len(rows) == len(ev)  # masked, unusable and fuel-cut rows included
    for col in ("t", "cycle", "cylinder", "misfire", "verdict", "rpm", "throttle", "metric",
                "threshold", "confidence", "interval_deg"):
        assert col in rows[0]
    # every verdict the run holds is kept
    assert {r["verdict"] for r in rows} == {VERDICT_NAMES[int(v)] for v in np.unique(ev["verdict"])}
    np.testing.assert_allclose([float(r["t"]) for r in rows], ev["t"], atol=5e-7)
    assert [int(r["misfire"]) for r in rows] == (ev["verdict"] == 1).astype(int).tolist()
    assert rows[0]["interval_deg"] == ""  # NaN -> empty cell
    assert int(rows[0]["cylinder"]) == 1  # cylinders count from 1


def test_events_filters_and_json(capsys, store, tmp_path):
    path, ids, evs = store
    code, out, _ = run_cli(capsys, "events", "after", "--store", str(path), "--format", "json",
                           "--cylinder", "2", "--verdict", "misfire")
    rows = json.loads(out)
    assert len(rows) == 60 and all(r["cylinder"] == 2 and r["misfire"] == 1 for r in rows)
    target = tmp_path / "ev.csv"
    code, out, _ = run_cli(capsys, "events", "after", "--store", str(path), "--out", str(target))
    assert code == 0 and out == ""
    assert len(target.read_text().splitlines()) == len(evs["b"]) + 1


def test_trend_text_json_and_plot(capsys, store, tmp_path):
    path, ids, _ = store
    code, out, _ = run_cli(capsys, "trend", "misfire_rate", "--cylinder", "2", "--by",
                           "odometer", "--store", str(path), "--json")
    pts = json.loads(out)
    # every 30th / every 10th cycle of 600 -> 20/600 and 60/600 of counted events
    assert [round(p["value"], 3) for p in pts] == [round(2000 / 600, 3), 10.0]
    png = tmp_path / "t.png"
    code, out, _ = run_cli(capsys, "trend", "bar_vibration", "--rpm", "5000-6000", "--store",
                           str(path), "--plot", str(png))
    assert code == 0 and "7.500" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, RFC 2083


def test_compare_two_runs(capsys, store):
    path, ids, _ = store
    code, out, _ = run_cli(capsys, "compare", "before", "after", "--store", str(path), "--json")
    obj = json.loads(out)
    cyl2 = next(c for c in obj["cylinders"] if c["cylinder"] == 2)
    assert cyl2["rate_pct_diff"] == pytest.approx(10.0 - 2000 / 600)
    cyl1 = next(c for c in obj["cylinders"] if c["cylinder"] == 1)
    assert cyl1["interval_error_deg_diff"] == pytest.approx(-1.5, abs=0.05)
    whole, band = obj["vibration"]  # the whole-run row (b only) sorts first
    assert whole["rpm_lo"] is None and whole["rms_a"] is None and whole["rms_b"] == 5.0
    assert band["diff"] == pytest.approx(1.5)
    code, out, _ = run_cli(capsys, "compare", "before", "after", "--store", str(path))
    assert code == 0 and "diff = B - A" in out and "+6.67" in out


def test_report_command_writes_html_and_pngs(capsys, store, tmp_path):
    path, ids, _ = store
    out_dir = tmp_path / "rep"
    code, out, _ = run_cli(capsys, "report", "last", "--store", str(path), "--out", str(out_dir))
    assert code == 0
    html = out_dir / f"run{ids['b']}.html"
    assert f"report: {html}" in out
    assert html.read_text().count("data:image/png;base64,") >= 4


@pytest.mark.parametrize(
    ("argv", "code", "message"),
    [
        (["show", "nope"], 5, "no run with id or label 'nope'"),
        (["show", "99"], 5, "no run 99"),
        (["events", "last", "--verdict", "boom"], 2, "unknown verdict 'boom'"),
        (["events", "last", "--cylinder", "0"], 2, "--cylinder counts from 1"),
        (["trend", "misfire_rate", "--rpm", "6000-5000"], 2, "bad rpm band '6000-5000'"),
        (["trend", "bar_vibration", "--cylinder", "1"], 2, "does not apply"),
    ],
)
def test_bad_requests_give_one_error_line(capsys, store, argv, code, message):
    path, _, _ = store
    got, out, err = run_cli(capsys, *argv, "--store", str(path))
    assert got == code
    assert err.startswith("error: ") and message in err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_missing_store_file(capsys, tmp_path):
    code, _, err = run_cli(capsys, "runs", "--store", str(tmp_path / "none.db"))
    assert code == 5 and err.startswith("error: no store file")
    assert not (tmp_path / "none.db").exists()  # queries never create a store


def test_argparse_usage_errors_exit_2(capsys, store):
    path, _, _ = store
    code, _, err = run_cli(capsys, "trend", "coolant", "--store", str(path))
    assert code == 2 and "invalid choice" in err
    code, _, err = run_cli(capsys, "events", "last", "--format", "xml", "--store", str(path))
    assert code == 2


def test_replay_input_errors(capsys, tmp_path):
    db = str(tmp_path / "r.db")
    log = tmp_path / "ride.log"
    log.write_text("(0.0) can0 100#00\n")
    code, _, err = run_cli(capsys, "replay", "--rig", "no-such-rig", "--can", str(log),
                           "--store", db)
    assert code == 3 and err.startswith("error: ") and "no-such-rig" in err
    code, _, err = run_cli(capsys, "replay", "--rig", "larch", "--can", str(tmp_path / "x.log"),
                           "--store", db)
    assert code == 4 and "no such CAN log" in err
    code, _, err = run_cli(capsys, "replay", "--rig", "larch", "--can", str(log), "--accel",
                           "seat=x.acraw", "--store", db)
    assert code == 2 and "has no sensor 'seat'" in err and "bar_left" in err
    code, _, err = run_cli(capsys, "replay", "--rig", "larch", "--can", str(log), "--accel",
                           str(tmp_path / "none.acraw"), "--store", db)
    assert code == 4 and "capture for sensor 'bar_left'" in err
    code, _, err = run_cli(capsys, "replay", "--rig", "larch", "--can", str(log), "--pace", "0",
                           "--store", db)
    assert code == 2 and "--pace" in err


def test_ride_input_errors(capsys, tmp_path):
    code, _, err = run_cli(capsys, "ride", "--rig", "larch", "--port", "seat=loop://",
                           "--store", str(tmp_path / "r.db"))
    assert code == 2 and "has no sensor 'seat'" in err
    code, _, err = run_cli(capsys, "ride", "--rig", "larch", "--port", "bar_left",
                           "--store", str(tmp_path / "r.db"))
    assert code == 2 and "expected NAME=VALUE" in err


def test_an_internal_failure_is_one_error_line_not_a_traceback(tmp_path, capsys, monkeypatch):
    # a bug inside a command must reach the user as one line naming the failure and where,
    # with exit code 70 (EX_SOFTWARE, sysexits.h); CRANKBEAT_DEBUG=1 gives the full trace
    from crankbeat.logger.cli import cmd_runs
    from crankbeat.logger.cli import main as cli

    def broken(args):
        raise ZeroDivisionError("simulated bug")

    monkeypatch.setattr(cmd_runs, "run", broken)
    monkeypatch.delenv("CRANKBEAT_DEBUG", raising=False)
    rc = cli.main(["runs", "--store", str(tmp_path / "s.db")])
    err = capsys.readouterr().err
    assert rc == 70
    assert err.count("\n") == 1 and err.startswith("error: internal error")
    assert "ZeroDivisionError: simulated bug" in err and "Traceback" not in err
