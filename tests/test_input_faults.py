"""Damaged CAN logs neither stop the analysis nor change its answer in silence.

Each case damages the first 25 s of the shipped demo ride (a candump log written by the
simulator) in one way, replays it through the whole pipeline into a real SQLite store, and
compares with the undamaged replay: the run completes, the damage is counted in the stream
health, and the firing events keep their count, misfires and times within the log's span.
These were exit 2 (zero tooth period, NaN/inf time, clock step back) or silently wrong answers
(1 % duplicated lines: 981 unusable instead of 24; one frame a year early: events stored a year
early) before the frame guard and the decoder's checks.
"""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger import pipeline, stream
from crankbeat.logger.rig import load_rig
from crankbeat.logger.store import Store

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "demo.log"
SECONDS = 25.0


def _lines() -> list[str]:
    out = []
    with open(DEMO, encoding="ascii") as f:
        t0 = None
        for ln in f:
            t = float(ln[1 : ln.index(")")])
            t0 = t if t0 is None else t0
            if t - t0 > SECONDS:
                break
            out.append(ln)
    return out


LINES = _lines()
TEETH = [i for i, ln in enumerate(LINES) if " 0A0#" in ln]


def _stamp(line: str, t: float | str) -> str:
    a, b = line.index("(") + 1, line.index(")")
    return line[:a] + (t if isinstance(t, str) else f"{t:.6f}") + line[b:]


def _time(line: str) -> float:
    return float(line[line.index("(") + 1 : line.index(")")])


def _zero_period(ls):
    i = TEETH[4000]
    h = ls[i].index("#")
    ls[i] = ls[i][: h + 5] + "0000" + ls[i][h + 9 :]  # first tooth period (bytes 2-3) = 0
    return ls


def _duplicates(ls):
    rnd = random.Random(1)
    out = []
    for ln in ls:
        out.append(ln)
        if rnd.random() < 0.01:
            out.append(ln)
    return out


def _early(ls):
    for k in random.Random(2).sample(TEETH[500:-500], 25):
        ls[k] = _stamp(ls[k], _time(ls[k]) - 0.5)
    return ls


def _step_back(ls):
    mid = len(ls) // 2
    return ls[:mid] + [_stamp(ln, _time(ln) - 2.0) for ln in ls[mid:]]


DAMAGE = {
    "zero tooth period": (_zero_period, "can_bad_values", 1),
    "inf time": (lambda ls: ls[:3000] + [_stamp(ls[3000], "inf")] + ls[3001:], "can_bad_time", 1),
    "nan time": (lambda ls: ls[:3000] + [_stamp(ls[3000], "nan")] + ls[3001:], "can_bad_time", 1),
    "1% duplicated lines": (_duplicates, "can_duplicates", 100),
    "25 crank frames 0.5 s early": (_early, "can_out_of_order", 25),
    "one frame a year early": (
        lambda ls: ls[:TEETH[5000]] + [_stamp(ls[TEETH[5000]], _time(ls[TEETH[5000]]) - 3.15e7)]
        + ls[TEETH[5000] + 1 :], "can_out_of_order", 1),
    "clock steps back 2 s": (_step_back, "can_time_steps", 1),
}


def _replay(tmp_path: Path, lines: list[str], name: str):
    log = tmp_path / f"{name}.log"
    log.write_text("".join(lines), encoding="ascii")
    rig = load_rig("larch")
    with Store.open(tmp_path / f"{name}.db") as store:
        res = pipeline.analyse_replay(rig, log, {}, store)
        ev = store.events(res.run_id)
    with stream.replay(rig, log) as chunks:
        health = [c.health for c in chunks][-1]
    return ev, health


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    return _replay(tmp_path_factory.mktemp("clean"), LINES, "clean")


def _verdicts(ev) -> dict:
    v = [e["verdict"] for e in ev]
    return {k: v.count(k) for k in set(v)}


@pytest.mark.parametrize("case", list(DAMAGE))
def test_damage_is_counted_and_the_answer_stays(tmp_path, clean, case):
    damage, counter, at_least = DAMAGE[case]
    ev, health = _replay(tmp_path, damage(list(LINES)), "bad")
    ev0, _ = clean
    assert getattr(health, counter) >= at_least, health.as_dict()
    assert health.notes, "the damage must be noted"
    # same firing events (a dropped frame may make a neighbouring event unusable)
    assert abs(len(ev) - len(ev0)) <= 2
    v, v0 = _verdicts(ev), _verdicts(ev0)
    assert abs(v.get("misfire", 0) - v0.get("misfire", 0)) <= 2, (v, v0)
    assert v.get("unusable", 0) <= v0.get("unusable", 0) + 25, (v, v0)
    t = np.array([e["t"] for e in ev])
    first, last = _time(LINES[0]), _time(LINES[-1])
    slack = 2.1 if counter == "can_time_steps" else 0.0  # times after a step back are shifted
    assert np.nanmin(t) >= first and np.nanmax(t) <= last + slack


def test_duplicates_without_a_counter_are_frames_with_the_same_bytes_at_once(tmp_path):
    # the engine status message (100 Hz) has no rolling counter: a line repeated at the same
    # time is one frame, the same bytes 10 ms later are two
    status = [i for i, ln in enumerate(LINES) if " 100#" in ln][:50]
    ls = list(LINES)
    for i in reversed(status[::5]):
        ls.insert(i + 1, ls[i])
    _, health = _replay(tmp_path, ls, "dup_status")
    assert health.can_duplicates == 10
