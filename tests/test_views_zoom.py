"""The event zoom's raw crank data and the channel view's fuel-cut marks, on the demo ride whose
script (fixtures/demo/demo.scenario.toml, the simulator's input) says what happened when; every
figure's title says what it shows."""

from __future__ import annotations

import shutil
import sqlite3
import tomllib
from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.events import FIRED, MISFIRE
from crankbeat.logger.cli.main import main
from crankbeat.logger.figures import channel_view, event_at, event_crank, ride_start
from crankbeat.logger.report import make_run_report
from crankbeat.logger.report.style import saved_axes, saved_title
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parents[1]
#: Larch: 60-2 wheel (logger/presets/larch.toml); a four-stroke cycle is two revolutions
#: (common practice), so one cycle spans 120 tooth pitches
PITCHES_PER_CYCLE = 2 * 60


def _segment(label: str) -> tuple[float, float]:
    script = tomllib.loads((ROOT / "fixtures/demo/demo.scenario.toml").read_text("utf-8"))
    starts = np.cumsum([0.0] + [s["duration"] for s in script["segment"]])
    i = next(i for i, s in enumerate(script["segment"]) if s["label"] == label)
    return float(starts[i]), float(starts[i + 1])


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory, demo_ride):
    log, caps = demo_ride
    db = tmp_path_factory.mktemp("zoom") / "d.db"
    argv = ["replay", "--store", str(db), "--rig", "larch", "--can", str(log), "--json"]
    for cap in caps:
        argv += ["--accel", str(cap)]
    assert main(argv) == 0
    return db


def _burst_events(st):
    ev = st.events(1)
    lo, hi = _segment("misfire burst")
    t = ev["t"] - ride_start(st, 1, ev)
    inside = (t > lo) & (t < hi) & (ev["cylinder"] == 2)
    return ev, np.flatnonzero(inside & (ev["verdict"] == MISFIRE)), \
        np.flatnonzero(inside & (ev["verdict"] == FIRED))


def test_zoom_periods_are_the_recordings_own(demo_db):
    with Store.open(demo_db, create=False) as st:
        ev, mis, _ = _burst_events(st)
        crank = event_crank(st, 1, int(mis[0]))
        t0 = ride_start(st, 1, ev)
    assert crank["why"] == ""
    own = sorted(t for t, c in crank["tdcs"] if c == 2)
    assert len(own) == 5  # two cycles either side of the event and its own
    for a, b in zip(own[:-1], own[1:], strict=True):
        between = (crank["t"] > a) & (crank["t"] <= b)
        # a working cycle holds 120 pitches of the wheel, and its periods add up to its time
        # (to the period that straddles each TDC)
        assert abs(int(crank["teeth"][between].sum()) - PITCHES_PER_CYCLE) <= 1
        assert crank["period_ms"][between].sum() / 1e3 == pytest.approx(b - a, abs=6e-4)
    # the bike sends periods in steps of 0.25 us (logger/presets/larch.toml: scale 0.25e-6)
    ticks = crank["period_ms"] * 4e3
    assert np.allclose(ticks, np.round(ticks), atol=1e-6)
    assert crank["t"].min() < ev["t"][mis[0]] - t0 < crank["t"].max()


def _rise(angle, rpm):
    """Speed gained over the expansion stroke: mean over 60..180 deg after TDC minus the mean
    over the 40 deg before TDC, rpm."""
    after = (angle >= 60) & (angle <= 180)
    before = (angle >= -40) & (angle <= 0)
    return float(np.mean(rpm[after]) - np.mean(rpm[before]))


def test_zoom_speed_shows_the_misfire_against_the_reference(demo_db):
    """A misfire loses the crank's rise after TDC (no expansion work); a fired event of the same
    cylinder rises as its reference does (common practice)."""
    with Store.open(demo_db, create=False) as st:
        _, mis, fired = _burst_events(st)
        m = event_crank(st, 1, int(mis[len(mis) // 2]))
        f = event_crank(st, 1, int(fired[len(fired) // 2]))
    for z in (m, f):
        assert z["ref_count"] >= 5
        assert z["angle"].min() < -170 and z["angle"].max() > 350
    ref_rise = _rise(m["ref_angle"], m["ref_rpm"])
    # measured on the demo (make demo, run 2): reference +277 rpm, misfire -48, fired +235
    assert ref_rise > 50
    assert _rise(m["angle"], m["rpm"]) < 0.5 * ref_rise
    assert _rise(f["angle"], f["rpm"]) > 0.5 * _rise(f["ref_angle"], f["ref_rpm"])


def test_zoom_without_the_recording_says_so(demo_db, tmp_path, capsys):
    moved = tmp_path / "moved.db"
    shutil.copy(demo_db, moved)
    with sqlite3.connect(moved) as db:
        db.execute("UPDATE sources SET path = path || '.gone' WHERE kind = 'can'")
    db.close()
    with Store.open(moved, create=False) as st:
        _, mis, _ = _burst_events(st)
        assert "not there any more" in event_crank(st, 1, int(mis[0]))["why"]
    png = tmp_path / "z.png"
    assert main(["show", "1", "--store", str(moved), "--event", str(int(mis[0]) + 1),
                 "--plot", str(png)]) == 0
    assert "no tooth periods" in saved_title(png)
    assert [a["ylabel"] for a in saved_axes(png)] == ["metric [-]"]


def test_zoom_figure_has_periods_speed_and_metric(demo_db, tmp_path):
    png = tmp_path / "zoom.png"
    lo, hi = _segment("misfire burst")
    assert main(["show", "1", "--store", str(demo_db), "--at", f"{0.5 * (lo + hi)}",
                 "--cylinder", "2", "--plot", str(png)]) == 0
    assert [a["ylabel"] for a in saved_axes(png)] == ["tooth period [ms]", "crank speed [rpm]",
                                                     "metric [-]"]
    assert "tooth periods, crank speed against its cylinder's reference" in saved_title(png)


def test_fuel_cut_spans_line_up_with_the_script(demo_db, tmp_path):
    with Store.open(demo_db, create=False) as st:
        view = channel_view(st, 1)
    lo, hi = _segment("overrun fuel cut")
    longest = max(view["fuel_cut_spans"], key=lambda s: s[1] - s[0])
    # the ECU cuts fuel once the throttle has closed above the cut speed and stops at the
    # segment's end (throttle opens): within a second of the script
    assert longest[0] == pytest.approx(lo, abs=1.0) and longest[1] == pytest.approx(hi, abs=1.0)
    ev = view["events"]
    for a, b in view["fuel_cut_spans"]:
        inside = ev[(ev["t"] >= a) & (ev["t"] <= b)]
        assert np.all(inside["verdict"] != MISFIRE)
    png = tmp_path / "ch.png"
    assert main(["show", "1", "--store", str(demo_db), "--plot", str(png)]) == 0
    assert "hatched: overrun fuel cut" in saved_title(png)


def test_every_report_figure_says_what_it_shows(demo_db, tmp_path):
    with Store.open(demo_db, create=False) as st:
        rep = make_run_report(st, 1, tmp_path / "out")
    pngs = sorted((tmp_path / "out").glob("*.png"))
    assert len(pngs) >= 6, rep
    for png in pngs:
        title = saved_title(png) or saved_axes(png)[0]["title"]
        assert len(title) > 25, (png.name, title)
        assert "dsp" not in title and "_" not in title, (png.name, title)  # no internal names


def test_event_at_picks_the_nearest_event(demo_db):
    with Store.open(demo_db, create=False) as st:
        ev = st.events(1)
        t0 = ride_start(st, 1, ev)
    i = event_at(ev, 40.0, t0)
    assert abs(ev["t"][i] - t0 - 40.0) == pytest.approx(np.min(np.abs(ev["t"] - t0 - 40.0)))


def test_zoom_on_an_engine_whose_phase_is_unknown(tmp_path):
    """The flat-plane four of fixtures/alder has no cam and fires evenly: a fresh reading of its
    log may number the revolutions one apart from the run's. The zoom finds each event's TDC by
    its time, so a misfire still loses the rise after its TDC (it was drawn 360 deg off)."""
    db = tmp_path / "a.db"
    assert main(["replay", "--store", str(db), "--rig", "alder", "--can",
                 str(ROOT / "fixtures/alder/alder.asc"), "--json"]) == 0
    with Store.open(db, create=False) as st:
        ev = st.events(1)
        mis = np.flatnonzero(ev["verdict"] == MISFIRE)
        assert len(mis) >= 3
        for i in mis[:3]:
            z = event_crank(st, 1, int(i))
            assert z["ref_count"] >= 5
            assert _rise(z["angle"], z["rpm"]) < _rise(z["ref_angle"], z["ref_rpm"]) - 50
