"""Trend queries across runs, against counts and r.m.s. pooling done by hand."""

from __future__ import annotations

import math

import pytest
from test_store_fill import counts, fill_run, make_events

from crankbeat.errors import UsageError
from crankbeat.logger.store import Store, parse_rpm_band


def _vib(sensor, bands, axis="sum", weighting="Wh", n=1000):
    rows = []
    for (lo, hi), rms in bands:
        rows.append({"sensor": sensor, "rpm_lo": lo, "rpm_hi": hi, "axis": axis,
                     "weighting": weighting, "rms": rms, "n": n})
    return rows


@pytest.fixture
def history(tmp_path):
    """Three runs: started out of odometer order; cylinder 2 gets worse; a late interval drift."""
    st = Store.open(tmp_path / "h.db")
    evs = {
        "a": make_events(1000, misfire_every={2: 100}, seed=1),
        "b": make_events(1000, misfire_every={2: 20}, seed=2),
        "c": make_events(1000, misfire_every={2: 10, 1: 50}, interval_offset={2: 2.0}, seed=3),
    }
    ids = {
        "a": fill_run(st, evs["a"], label="a", odometer_km=1000.0,
                      started_at="2026-01-01T08:00:00+00:00",
                      vibration=_vib("bar_left", [((5000, 5500), 3.0), ((5500, 6000), 4.0)])
                      + _vib("seat", [((5000, 5500), 9.0)], weighting="Wk")),
        "b": fill_run(st, evs["b"], label="b", odometer_km=3000.0,
                      started_at="2026-01-02T08:00:00+00:00",
                      vibration=_vib("bar_left", [((None, None), 70.0)])
                      + _vib("bar_left", [((5000, 5500), 5.0)], axis="x")
                      + _vib("bar_left", [((5000, 5500), 12.0)], axis="y")
                      + _vib("bar_left", [((5000, 5500), 84.0)], axis="z")),
        "c": fill_run(st, evs["c"], label="c", odometer_km=2000.0,
                      started_at="2026-01-03T08:00:00+00:00"),
    }
    yield st, ids, evs
    st.close()


def test_misfire_rate_per_cylinder_by_date(history):
    st, ids, evs = history
    pts = st.trend("misfire_rate", cylinder=2)
    assert [p.run_id for p in pts] == [ids["a"], ids["b"], ids["c"]]
    for p, key in zip(pts, "abc", strict=True):
        mis, counted = counts(evs[key], 2)
        assert p.series == "cyl 2" and p.n == counted
        assert p.value == pytest.approx(100.0 * mis / counted)
    # every 10th of 1000 cycles -> 100 misfires of 1000 counted events = 10 % (arithmetic)
    assert pts[-1].value == pytest.approx(10.0)


def test_by_odometer_orders_and_last_keeps_the_tail(history):
    st, ids, _ = history
    pts = st.trend("misfire_rate", cylinder=1, by="odometer")
    assert [p.odometer_km for p in pts] == [1000.0, 2000.0, 3000.0]
    tail = st.trend("misfire_rate", cylinder=1, by="odometer", last=2)
    assert [p.run_id for p in tail] == [ids["c"], ids["b"]]
    both = st.trend("misfire_rate")
    assert {p.series for p in both} == {"cyl 1", "cyl 2"} and len(both) == 6


def test_rpm_band_filters_events(history):
    st, ids, evs = history
    (p,) = st.trend("misfire_rate", cylinder=2, rpm_band="5000-6000", last=1)
    ev = evs["c"]
    sel = ev[(ev["rpm"] >= 5000) & (ev["rpm"] < 6000)]
    mis, counted = counts(sel, 2)
    assert p.n == counted and 0 < counted < 1000
    assert p.value == pytest.approx(100.0 * mis / counted)


def test_interval_error_shows_the_drift(history):
    st, ids, _ = history
    pts = {p.run_id: p for p in st.trend("interval_error", cylinder=2)}
    # make_events: offset +2.0 deg on the interval ending at cylinder 2 in run c, noise 0.2 deg
    # over ~900 fired events -> standard error ~0.007 deg.
    assert pts[ids["c"]].value == pytest.approx(2.0, abs=0.05)
    assert pts[ids["a"]].value == pytest.approx(0.0, abs=0.05)


def test_bar_vibration_pools_bands_and_sums_axes(history):
    st, ids, _ = history
    pts = {p.run_id: p for p in st.trend("bar_vibration", rpm_band="5000-6000")}
    assert set(pts) == {ids["a"], ids["b"]}  # run c has no vibration rows
    # r.m.s. of two equal-length bands: sqrt((3² + 4²) / 2)
    assert pts[ids["a"]].value == pytest.approx(math.sqrt(12.5))
    assert pts[ids["a"]].series == "bar_left"  # the seat sensor is not a bar sensor in larch
    # ISO 5349-1 vibration total value a_hv = sqrt(x² + y² + z²): sqrt(25 + 144 + 7056) = 85
    assert pts[ids["b"]].value == pytest.approx(85.0)
    (only_low,) = [p for p in st.trend("bar_vibration", rpm_band="5000-5500")
                   if p.run_id == ids["a"]]
    assert only_low.value == pytest.approx(3.0)
    every = {p.run_id: p for p in st.trend("bar_vibration")}
    assert every[ids["b"]].value == pytest.approx(70.0)  # the whole-run row, not the bands
    assert every[ids["a"]].value == pytest.approx(math.sqrt(12.5))  # no whole-run row: pooled


def test_contribution_trend(history):
    st, _, _ = history
    pts = st.trend("contribution", cylinder=1)
    assert all(p.value == pytest.approx(1.0, abs=0.01) for p in pts)


@pytest.mark.parametrize("text", ["5000", "6000-5000", "abc-def", "5000-", ""])
def test_bad_rpm_band_is_a_usage_error(text):
    with pytest.raises(UsageError, match="bad rpm band") as info:
        parse_rpm_band(text)
    assert info.value.exit_code == 2


def test_bad_trend_options(history):
    st, _, _ = history
    with pytest.raises(UsageError, match="unknown trend metric"):
        st.trend("coolant")
    with pytest.raises(UsageError, match="cylinder does not apply"):
        st.trend("bar_vibration", cylinder=1)
    with pytest.raises(UsageError, match="--last"):
        st.trend("misfire_rate", last=0)
    assert parse_rpm_band(" 5000 - 6000 ") == (5000.0, 6000.0)


def _gear_channel(st, run_id, ev):
    """Gear 3, then gear 4 from a 10 Hz sample near the run's middle on; returns that sample's
    time (an event before it reads gear 3, one at or after it gear 4: the sample at or before
    the event holds)."""
    import numpy as np

    t = np.arange(int(ev["t"][-1] / 0.1) + 2) * 0.1
    k = len(t) // 2
    st.add_channels(run_id, {"gear": (t, np.where(np.arange(len(t)) < k, 3.0, 4.0))})
    st.commit()
    return float(t[k])


def test_channel_filter_counts_the_events_in_that_gear(history):
    st, ids, evs = history
    ev = evs["c"]
    split_t = _gear_channel(st, ids["c"], ev)
    for gear, part in (("3", ev[ev["t"] < split_t]), ("4", ev[ev["t"] >= split_t])):
        (pt,) = [p for p in st.trend("misfire_rate", cylinder=2, channel=f"gear={gear}")
                 if p.run_id == ids["c"]]
        mis, counted = counts(part, 2)
        assert pt.n == counted and mis > 0
        assert pt.value == pytest.approx(100.0 * mis / counted)
    # runs without a gear channel have no events in any gear: no value, not a zero
    others = [p for p in st.trend("misfire_rate", cylinder=2, channel="gear=3")
              if p.run_id != ids["c"]]
    assert all(p.n == 0 and p.value is None for p in others)


def test_trend_command_takes_a_channel_filter_and_an_analyser(history, capsys):
    import json

    from crankbeat.logger.cli.main import main

    st, ids, evs = history
    ev = evs["c"]
    split_t = _gear_channel(st, ids["c"], ev)
    st.db.execute("UPDATE runs SET analyser = '0.0.9+r0' WHERE id = ?", (ids["a"],))
    st.commit()
    path = str(st.path)
    assert main(["trend", "misfire_rate", "--store", path, "--cylinder", "2",
                 "--channel", "gear=3-4", "--json"]) == 0  # 3 <= gear < 4
    got = {p["run_id"]: p for p in json.loads(capsys.readouterr().out)}
    assert got[ids["c"]]["n"] == counts(ev[ev["t"] < split_t], 2)[1]
    assert main(["trend", "misfire_rate", "--store", path, "--analyser", "0.0.9+r0",
                 "--json"]) == 0
    assert {p["run_id"] for p in json.loads(capsys.readouterr().out)} == {ids["a"]}
    assert main(["trend", "misfire_rate", "--store", path, "--channel", "gear"]) == 2
    assert "gear" in capsys.readouterr().err
