"""The time-aligned channel view and the event zoom: the data behind them, on the demo ride
whose script (fixtures/demo/demo.scenario.toml, the simulator's input) says what happened when."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.events import FIRED, MISFIRE
from crankbeat.logger.cli.main import main
from crankbeat.logger.figures import (
    channel_view,
    event_at,
    event_neighbourhood,
    ride_start,
    spans_of,
)
from crankbeat.logger.report.style import saved_axes, saved_title
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parents[1]


def _segments() -> dict[str, tuple[float, float, dict]]:
    script = tomllib.loads((ROOT / "fixtures/demo/demo.scenario.toml").read_text("utf-8"))
    starts = np.cumsum([0.0] + [s["duration"] for s in script["segment"]])
    return {s["label"]: (starts[i], starts[i + 1], s) for i, s in enumerate(script["segment"])}


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory, demo_ride):
    log, caps = demo_ride
    db = tmp_path_factory.mktemp("ch") / "d.db"
    argv = ["replay", "--store", str(db), "--rig", "larch", "--can", str(log), "--json"]
    for cap in caps:
        argv += ["--accel", str(cap)]
    assert main(argv) == 0
    return db


def test_spans_join_close_times():
    assert spans_of(np.array([1.0, 1.2, 1.4, 5.0, 5.1, np.nan]), 0.5) == [(1.0, 1.4), (5.0, 5.1)]
    assert spans_of(np.zeros(0), 0.5) == []


def test_channels_and_rough_road_line_up_with_the_ride_script(demo_db):
    seg = _segments()
    with Store.open(demo_db, create=False) as st:
        view = channel_view(st, 1)
    assert {"rpm", "throttle", "gear", "road_speed", "coolant"} <= set(view["channels"])
    t, gear = view["channels"]["gear"]
    for label in ("cruise", "misfire burst"):
        lo, hi, s = seg[label]
        inside = (t > lo + 0.5) & (t < hi - 0.5)
        assert set(gear[inside].tolist()) == {float(s["gear"])}
    # one rough-road span, within a second of the script's (masking follows the accelerometer)
    lo, hi, _ = seg["rough road"]
    assert len(view["masked_spans"]) == 1
    a, b = view["masked_spans"][0]
    assert a == pytest.approx(lo, abs=1.0) and b == pytest.approx(hi, abs=1.0)
    # times are seconds into the ride: the channels start at 0 and end with the 60 s ride
    assert t.min() == pytest.approx(0.0, abs=0.2) and t.max() == pytest.approx(60.0, abs=0.5)


def test_zoom_centres_on_the_asked_event_and_shows_its_neighbours(demo_db, tmp_path, capsys):
    lo, hi, _ = _segments()["misfire burst"]
    at = 0.5 * (lo + hi)
    with Store.open(demo_db, create=False) as st:
        ev = st.events(1)
        i = event_at(ev, at, ride_start(st, 1, ev), cylinder=2)
        near = event_neighbourhood(ev, i, cycles=10)
    assert ev["cylinder"][i] == 2
    centre = near["events"][near["centre"]]
    assert centre["cycle"] == ev["cycle"][i] and centre["t"] == ev["t"][i]
    # 10 cycles either side of a twin: 21 cycles, two events each (common practice)
    assert len(near["events"]) == 2 * 21
    assert np.ptp(near["events"]["cycle"]) == 20
    own = ev[(ev["cylinder"] == 2) & (ev["verdict"] == FIRED)]
    assert near["reference"] == pytest.approx(float(np.median(own["metric"])))
    assert np.any(near["events"]["verdict"] == MISFIRE)  # the script's burst is in view
    png = tmp_path / "zoom.png"
    assert main(["show", "1", "--store", str(demo_db), "--at", f"{at}", "--cylinder", "2",
                 "--plot", str(png)]) == 0
    ax = saved_axes(png)[-1]  # periods and speed above it: tests/test_views_zoom.py
    assert ax["ylabel"] == "metric [-]" and ax["xlabel"].startswith("cylinder of each")
    assert f"{ev['t'][i] - ride_start_of(demo_db, ev):.2f} s into the ride" in saved_title(png)
    png2 = tmp_path / "channels.png"
    assert main(["show", "1", "--store", str(demo_db), "--plot", str(png2)]) == 0
    labels = [a["ylabel"] for a in saved_axes(png2)]
    assert labels[:2] == ["engine speed [rpm]", "throttle [%]"] and labels[-1] == "metric [-]"
    assert main(["show", "1", "--store", str(demo_db), "--event", "0", "--plot",
                 str(png)]) == 2
    assert "--event must be 1.." in capsys.readouterr().err


def ride_start_of(db, ev):
    with Store.open(db, create=False) as st:
        return ride_start(st, 1, ev)
