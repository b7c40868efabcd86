"""One misfire rate everywhere: summary, `show`, trend, channel trend, windows and the live screen.

The OBD misfire monitors express misfires as a percentage of the firing events in a window of
crank revolutions (from memory of 13 CCR 1968.2(e)(3)); a partial burn is a firing event that is
no misfire, so it counts in the denominator, while events not judged for combustion (masked,
fuel cut, unusable) count nowhere (common practice). Each view is checked against a hand count
of the same events.
"""

from __future__ import annotations

import numpy as np
from test_store_fill import fill_run, larch_like_rig, make_events

from crankbeat.dsp.analysis import misfire_counts, window_rates
from crankbeat.dsp.events import FIRED, MISFIRE, PARTIAL
from crankbeat.logger.live import LiveTally
from crankbeat.logger.run_summary import RunSummary
from crankbeat.logger.store import Store


def _events_with_partial_burns() -> np.ndarray:
    """Cylinder 2 misfires every 10th cycle; cylinder 1 burns part of its charge every 4th
    cycle and misfires every 25th; the special cycles add masked, unusable and fuel-cut."""
    ev = make_events(1000, misfire_every={2: 10})
    cyc, cyl = ev["cycle"], ev["cylinder"]
    one = (cyl == 1) & (ev["verdict"] == FIRED)
    ev["verdict"][one & (cyc % 4 == 3)] = PARTIAL
    ev["verdict"][one & (cyc % 25 == 24)] = MISFIRE
    return ev


def _hand_rate(ev: np.ndarray, cyl: int) -> tuple[float, int]:
    """(rate %, counted) of one cylinder, row by row."""
    mis = counted = 0
    for row in ev[ev["cylinder"] == cyl]:
        v = int(row["verdict"])
        counted += v in (FIRED, PARTIAL, MISFIRE)
        mis += v == MISFIRE
    return 100.0 * mis / counted, counted


def test_every_stored_view_takes_partial_burns_as_counted_events(tmp_path):
    ev = _events_with_partial_burns()
    rig = larch_like_rig()
    expected = {c: _hand_rate(ev, c) for c in (1, 2)}
    assert np.sum(ev["verdict"] == PARTIAL) > 200  # the case this test is about is present
    # the partial burns change cylinder 1's rate: a definition without them would fail here
    with_partial, counted = expected[1]
    no_partial = 100.0 * np.sum((ev["cylinder"] == 1) & (ev["verdict"] == MISFIRE)) / np.sum(
        (ev["cylinder"] == 1) & np.isin(ev["verdict"], (FIRED, MISFIRE)))
    assert abs(with_partial - no_partial) > 0.5

    counts = misfire_counts(ev, 2)
    summary = RunSummary(rig.engine, "twin-270", {})
    for chunk in np.array_split(ev, 13):
        summary.push(chunk)
    summary.finish()
    run_sum = summary.as_dict()["misfire"]
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        # gear 3 sampled every 0.1 s over the whole run (a status frame's rate, common practice)
        t_gear = np.arange(0.0, float(ev["t"].max()) + 0.1, 0.1)
        st.add_channels(run, {"gear": (t_gear, np.full(t_gear.size, 3.0))})
        st.commit()
        stats = {c["cylinder"]: c for c in st.cylinder_stats(run)}
        trend = {p.series: p for p in st.trend("misfire_rate")}
        by_gear = {p.series: p for p in st.trend("misfire_rate", channel="gear=3")}
    for c in (1, 2):
        rate, counted = expected[c]
        assert counts["rate_pct"][c - 1] == rate
        assert run_sum["per_cylinder"][c - 1]["rate_pct"] == rate
        assert stats[c]["rate_pct"] == rate
        assert stats[c]["partial"] == np.sum((ev["cylinder"] == c) & (ev["verdict"] == PARTIAL))
        assert (trend[f"cyl {c}"].value, trend[f"cyl {c}"].n) == (rate, counted)
        assert (by_gear[f"cyl {c}"].value, by_gear[f"cyl {c}"].n) == (rate, counted)
    n_mis = int(np.sum(ev["verdict"] == MISFIRE))
    assert run_sum["total_rate_pct"] == 100.0 * n_mis / sum(n for _, n in expected.values())
    assert window_rates(ev, revolutions=2000, engine=rig.engine)[0]["counted"].sum() == sum(
        counted for _, counted in expected.values())


def test_live_window_rate_counts_partial_burns_like_the_stored_windows():
    rig = larch_like_rig()
    ev = _events_with_partial_burns()
    tally = LiveTally(rig.engine)
    for chunk in np.array_split(ev, 29):
        tally.push_events(chunk)
    state = tally.state(0.0)
    # the live window is the last 200 revolutions = the last 100 cycles of a four-stroke
    last = ev[ev["cycle"] >= ev["cycle"].max() - 99]
    for c in state.cylinders:
        rate, _ = _hand_rate(last, c.cylinder)
        assert c.rate200_pct == rate
        assert c.partial == np.sum((ev["cylinder"] == c.cylinder) & (ev["verdict"] == PARTIAL))
        assert c.events == _hand_rate(ev, c.cylinder)[1]
    # the fixed 200-revolution windows of replay over the same last 100 cycles agree
    wins, per_cyl = window_rates(last, revolutions=200, engine=rig.engine)
    assert len(wins) == 1
    np.testing.assert_array_equal(per_cyl[0], [c.rate200_pct for c in state.cylinders])


def test_live_counts_follow_a_rough_road_mask_like_the_store(tmp_path):
    # the live path publishes verdicts before a rough-road span closes; the span then masks the
    # judged events inside it (fired, partial, misfire) in the store, and the live counts must
    # drop them the same way
    rig = larch_like_rig()
    ev = _events_with_partial_burns()
    span = (float(ev["t"][1500]), float(ev["t"][1700]))
    tally = LiveTally(rig.engine)
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        st.mask_events(run, [span])
        st.commit()
        stats = {c["cylinder"]: c for c in st.cylinder_stats(run)}
    for chunk in np.array_split(ev, 29):
        tally.push_events(chunk)
    tally.mask([span])
    for c in tally.state(0.0).cylinders:
        s = stats[c.cylinder]
        assert (c.events, c.misfires, c.partial) == (
            s["fired"] + s["partial"] + s["misfires"], s["misfires"], s["partial"])
    assert sum(s["masked"] for s in stats.values()) > 150  # the span holds judged events
