"""The run page's tables (headline, misfire list, vibration, settings, notes) and the index,
checked on synthetic events with known patterns and on the demo ride, whose script
(fixtures/demo/demo.scenario.toml, the simulator's input) says what happened when."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.dsp.events import MISFIRE
from crankbeat.logger.cli.main import main
from crankbeat.logger.report import make_run_report, tables
from crankbeat.logger.report.page import read_digest
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parents[1]


def _cycle_to_t(ev, cylinder, cycle):
    return float(ev["t"][(ev["cylinder"] == cylinder) & (ev["cycle"] == cycle)][0])


def test_misfire_list_names_the_patterns_as_show_does(tmp_path):
    ev = make_events(400, special=False)
    # consecutive: cylinder 1 misses five cycles in a row (100..104)
    ev["verdict"][(ev["cylinder"] == 1) & (ev["cycle"] >= 100) & (ev["cycle"] <= 104)] = MISFIRE
    # alternating: the two cylinders take turns missing (cycle 200 cyl 2, 201 cyl 1, 202 cyl 2)
    for cyl, cycle in ((2, 200), (1, 201), (2, 202)):
        ev["verdict"][(ev["cylinder"] == cyl) & (ev["cycle"] == cycle)] = MISFIRE
    # isolated: one miss with nothing within 4 cycles
    ev["verdict"][(ev["cylinder"] == 2) & (ev["cycle"] == 300)] = MISFIRE
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        # gear 3 until cycle 250, then 4: a channel sampled every 0.1 s
        tg = np.arange(0.0, float(ev["t"].max()) + 0.1, 0.1)
        st.add_channels(run, {"gear": (tg, np.where(tg < _cycle_to_t(ev, 1, 250), 3.0, 4.0))})
        st.commit()
        rows = tables.misfire_rows(st, run)
    assert len(rows) == 5 + 3 + 1
    assert [r["t_s"] for r in rows] == sorted(r["t_s"] for r in rows)
    by_cycle = {(r["cylinder"], round(r["t_s"], 6)): r for r in rows}
    t0 = float(ev["t"].min())  # the synthetic run stores no t_start: zero is the first event
    for c in range(100, 105):
        r = by_cycle[(1, round(_cycle_to_t(ev, 1, c) - t0, 6))]
        assert r["pattern"] == "consecutive" and r["gear"] == 3.0
    assert {r["pattern"] for r in rows if 190 < _cycle(ev, r, t0) < 210} == {"alternating"}
    last = rows[-1]
    assert last["pattern"] == "isolated" and last["gear"] == 4.0 and last["cylinder"] == 2
    # rpm and throttle are the event's own (make_events: 30 % throttle throughout)
    assert last["throttle"] == 30.0
    assert last["rpm"] == pytest.approx(float(ev["rpm"][(ev["cylinder"] == 2)
                                                         & (ev["cycle"] == 300)][0]))


def _cycle(ev, row, t0):
    i = int(np.argmin(np.abs(ev["t"] - t0 - row["t_s"])))
    return int(ev["cycle"][i])


def test_settings_tables_are_the_rig_file_itself():
    text = (ROOT / "logger" / "presets" / "larch.toml").read_text(encoding="utf-8")
    doc = tomllib.loads(text)
    got = dict(tables.settings_tables(text))
    assert dict(got["wheel"])["teeth"] == str(doc["wheel"]["teeth"])
    assert dict(got["limits"])["misfire_alert_pct"] == str(doc["limits"]["misfire_alert_pct"])
    messages = dict(got["can.message"])
    assert set(messages) == {m["name"] for m in doc["can"]["message"]}
    assert "signals: frame_counter" in messages["crank_teeth"]
    assert tables.settings_tables("[broken")[0][0] == "rig file"


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory, demo_ride):
    log, caps = demo_ride
    base = tmp_path_factory.mktemp("demo-report")
    db = base / "d.db"
    argv = ["replay", "--store", str(db), "--rig", "larch", "--can", str(log),
            "--notes", "the engineers own note"]
    for cap in caps:
        argv += ["--accel", str(cap)]
    assert main(argv + ["--json"]) == 0
    with Store.open(db, create=False) as st:
        rep = make_run_report(st, 1, base / "out")
        return rep, db


def test_demo_misfires_sit_where_the_ride_script_put_them(demo_report):
    _, db = demo_report
    script = tomllib.loads((ROOT / "fixtures/demo/demo.scenario.toml").read_text("utf-8"))
    # segment start times from the script's durations
    starts = np.cumsum([0.0] + [s["duration"] for s in script["segment"]])
    seg = {s["label"]: (starts[i], starts[i + 1], s.get("gear"))
           for i, s in enumerate(script["segment"])}
    with Store.open(db, create=False) as st:
        rows = tables.misfire_rows(st, 1)
    lo, hi, gear = seg["misfire burst"]
    burst = [r for r in rows if lo <= r["t_s"] < hi]
    assert len(burst) >= 20
    # gear read back from the stored CAN gear channel, as the script rode it
    assert {r["gear"] for r in burst} == {float(gear)}
    # the script's burst is on cylinder 2: none of its misfires there is called isolated
    assert "isolated" not in {r["pattern"] for r in burst if r["cylinder"] == 2}
    assert "consecutive" in {r["pattern"] for r in burst}
    lo, hi, gear = seg["cruise"]
    cruise = [r for r in rows if lo <= r["t_s"] < hi]
    assert cruise and {r["pattern"] for r in cruise} == {"isolated"}
    assert {r["gear"] for r in cruise} == {float(gear)}


def test_demo_page_and_index(demo_report):
    rep, db = demo_report
    text = rep.html.read_text(encoding="utf-8")
    with Store.open(db, create=False) as st:
        head = {h.name: h for h in tables.headline(st, 1)}
        vib = tables.vibration_rows(st, 1)
        summary = st.run(1)["summary"]
    # the demo's worst 200-revolution window is above the Larch's 2 % alert level
    # (logger/presets/larch.toml [limits]): headline in alarm, and said so
    assert head["alert level"].alarm and "EXCEEDED" in head["alert level"].value
    assert head["worst 200-rev window"].alarm
    assert head["misfires"].value.startswith(f"{summary['misfire']['total']} ")
    # vibration: the vector sum first, Wh for a handlebar (ISO 5349-1 weights the hand-arm)
    assert vib[0]["axis"] == "sum" and vib[0]["weighting"].startswith("Wh")
    # the vector sum of the axes is the root-sum-of-squares of the axis values (ISO 5349-1)
    axes = [r["rms"] for r in vib if r["axis"] in "xyz"]
    assert vib[0]["rms"] == pytest.approx(float(np.sqrt(np.sum(np.square(axes)))), rel=1e-6)
    # readable tables, not a key: value dump outside the collapsed text summary
    outside = text.split("<details>")[0]
    assert "<pre>" not in outside
    for heading in ("Misfire events", "Vibration", "Settings", "Notes"):
        assert f">{heading}" in outside
    assert "the engineers own note" in outside and "tdc_offset_deg" in outside
    assert "a run of partial burns" in outside and "m/s²" in outside
    assert not re.search(r"(src|href)=['\"](?!data:|#|index\.html|run\d+\.html)", text)
    index = (rep.html.parent / "index.html").read_text(encoding="utf-8")
    assert "href='run1.html'" in index and head["misfires"].value in index
    assert read_digest(rep.html)["headline"]["alert level"][1] is True


def test_index_lists_every_run_newest_first(tmp_path):
    with Store.open(tmp_path / "i.db") as st:
        runs = [fill_run(st, make_events(300, misfire_every={2: k}), label=f"ride {k}")
                for k in (10, 40)]
        for r in runs:
            make_run_report(st, r, tmp_path / "out")
    index = (tmp_path / "out" / "index.html").read_text(encoding="utf-8")
    links = re.findall(r"href='(run\d+\.html)'", index)
    assert links == [f"run{runs[1]}.html", f"run{runs[0]}.html"]
    assert "ride 10" in index and "ride 40" in index
