"""The misfire scorer and scripts/score_ride.py, against counts made by hand.

Definitions (the project's acceptance figures): detection rate = detected misfires / true
misfires; false-alarm rate = misfires declared on truly fired events / truly fired events;
fuel-cut, masked and unusable events are left out.
"""

from __future__ import annotations

import csv
import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.events import FIRED, FUEL_CUT, MASKED, MISFIRE, UNUSABLE, empty_events
from crankbeat.dsp.scoring import score_misfire
from crankbeat.errors import InputError

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "score_ride.py"


def _truth(n=20):
    t = np.arange(n) * 0.01  # cylinders alternate every 10 ms
    cyl = np.tile([1, 2], n // 2)
    fired = np.ones(n, bool)
    fired[[3, 8, 15]] = False
    fuel_cut = np.zeros(n, bool)
    fuel_cut[[18, 19]] = True
    fired[[18, 19]] = False
    return t, cyl, fired, fuel_cut


def test_counts_by_hand():
    t, cyl, fired, fc = _truth()
    det_t = t + 0.0005  # detected 0.5 ms late, well inside a quarter of 10 ms
    mis = np.zeros(t.size, bool)
    mis[[3, 8]] = True  # two of the three true misfires found
    mis[[5]] = True  # one false alarm
    mis[[18]] = True  # on a fuel-cut event: not counted
    verdict = np.where(mis, MISFIRE, FIRED)
    verdict[12] = MASKED  # excluded by the detector
    s = score_misfire((det_t, cyl, mis, verdict), (t, cyl, fired, fc))
    # counted: 20 - 2 fuel cut - 1 masked = 17 events, 3 misfires, 14 fired
    assert (s.true_misfires, s.detected_misfires) == (3, 2)
    assert (s.true_fired, s.false_alarms) == (14, 1)
    assert s.detection_rate == pytest.approx(2 / 3)
    assert s.false_alarm_rate == pytest.approx(1 / 14)
    assert s.excluded == 3 and s.excluded_by_verdict["masked"] == 1
    assert s.unmatched_detected == 0 and s.unmatched_truth == 0
    assert s.per_cylinder[2]["true_misfires"] == 2  # events 3 and 15 are on cylinder 2


def test_matching_needs_the_same_cylinder_and_a_close_time():
    t, cyl, fired, fc = _truth()
    det_t = t.copy()
    det_t[4] += 0.004  # 4 ms off: beyond a quarter of the 10 ms spacing
    det_cyl = cyl.copy()
    det_cyl[6] = 2  # wrong cylinder: cannot match its truth event
    s = score_misfire((det_t, det_cyl, np.zeros(t.size, bool)), (t, cyl, fired, fc))
    assert s.unmatched_truth == 2 and s.unmatched_detected == 2
    s2 = score_misfire((det_t, cyl, np.zeros(t.size, bool)), (t, cyl, fired, fc), tolerance_s=0.005)
    assert s2.unmatched_truth == 0


def test_event_array_and_verdict_names():
    t, cyl, fired, fc = _truth()
    ev = empty_events(t.size)
    ev["t"], ev["cylinder"], ev["verdict"] = t, cyl, FIRED
    ev["verdict"][[3, 8, 15]] = MISFIRE
    ev["verdict"][[18, 19]] = FUEL_CUT
    ev["verdict"][0] = UNUSABLE
    s = score_misfire(ev, {"t": t, "cylinder": cyl, "fired": fired, "fuel_cut": fc})
    assert s.detection_rate == 1.0 and s.false_alarms == 0 and s.excluded == 3
    names = np.array(["misfire" if v == MISFIRE else "fired" for v in ev["verdict"]])
    s2 = score_misfire((t, cyl, None, names), (t, cyl, fired, fc))
    assert s2.detected_misfires == 3


def test_bad_input_is_one_line():
    t, cyl, fired, fc = _truth()
    with pytest.raises(InputError, match="differ in length"):
        score_misfire((t, cyl[:-1], fired), (t, cyl, fired, fc))
    with pytest.raises(InputError, match="unknown verdict"):
        score_misfire((t, cyl, None, np.array(["boom"] * t.size)), (t, cyl, fired, fc))


def _load_script():
    spec = importlib.util.spec_from_file_location("score_ride", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _write(path, header, rows):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)


def test_score_ride_script_on_csv_files(tmp_path, capsys):
    t, cyl, fired, fc = _truth()
    mis = ~fired & ~fc
    mis[5] = True
    ev_rows = [(f"{a:.6f}", int(c), int(m), "misfire" if m else "fired")
               for a, c, m in zip(t, cyl, mis)]
    _write(tmp_path / "events.csv", ["t", "cylinder", "misfire", "verdict"], ev_rows)
    tr_rows = [(f"{a:.6f}", i // 2, int(c), int(f), 1.0 if f else 0.0, 0.0, 4000, 30, 0, int(x))
               for i, (a, c, f, x) in enumerate(zip(t, cyl, fired, fc))]
    _write(tmp_path / "truth.csv", ["t", "cycle", "cylinder", "fired", "burn_fraction",
                                    "retard_deg", "rpm", "throttle", "rough", "fuel_cut"], tr_rows)
    mod = _load_script()
    assert mod.main([str(tmp_path / "events.csv"), str(tmp_path / "truth.csv"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["detected_misfires"] == 3 and out["false_alarms"] == 1 and out["true_fired"] == 15
    assert mod.main([str(tmp_path / "events.csv"), str(tmp_path / "missing.csv")]) != 0
    assert capsys.readouterr().err.startswith("error: ")
