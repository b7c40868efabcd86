"""Firing intervals per firing pair, not pooled: the data behind the interval figure."""

from __future__ import annotations

import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.cli.main import main
from crankbeat.logger.figures import interval_events, interval_pairs, run_engine
from crankbeat.logger.report.run_plots import plot_intervals
from crankbeat.logger.report.style import saved_axes
from crankbeat.logger.store import Store


def test_twin_pairs_keep_their_own_offsets(tmp_path):
    # the interval ending at cylinder 2 is 2 deg late; twin-270 promises 270 then 450 deg
    # (720 deg cycle of a 4-stroke, pins 270 apart: common practice)
    ev = make_events(400, interval_offset={2: 2.0}, special=False)
    with Store.open(tmp_path / "i.db") as st:
        run = fill_run(st, ev)
        engine = run_engine(st, run)
        pairs = interval_pairs(ev, None, engine)
        png = plot_intervals(ev, tmp_path / "i.png", engine=engine, tolerance_deg=3.0)
    assert [(p["from_cyl"], p["to_cyl"], p["expected_deg"]) for p in pairs] == \
        [(2, 1, 450.0), (1, 2, 270.0)]
    assert float(np.mean(pairs[1]["observed_deg"])) == pytest.approx(272.0, abs=0.1)
    assert float(np.mean(pairs[0]["observed_deg"])) == pytest.approx(450.0, abs=0.1)
    axes = saved_axes(png)
    assert [a["title"] for a in axes] == ["cylinder 2 → 1", "cylinder 1 → 2"]
    assert {a["xlabel"] for a in axes} == {"observed firing interval [crank deg]"}
    assert {a["ylabel"] for a in axes} == {"events"}


def test_four_shows_four_pairs_in_firing_order(tmp_path):
    db = tmp_path / "a.db"
    assert main(["replay", "--store", str(db), "--rig", "alder", "--can",
                 "fixtures/alder/alder.asc", "--json"]) == 0
    with Store.open(db, create=False) as st:
        ev = st.events(1)
        summary = st.run(1)["summary"]
        engine = run_engine(st, 1)
    pairs = interval_pairs(ev, summary, engine)
    # an inline four fires 1-3-4-2 (common practice), every 720/4 = 180 deg
    assert [(p["from_cyl"], p["to_cyl"]) for p in pairs] == [(2, 1), (1, 3), (3, 4), (4, 2)]
    assert [p["expected_deg"] for p in pairs] == [180.0] * 4
    # split, not pooled: every interval the check used lands in exactly one pair
    used = interval_events(ev, summary)
    assert sum(p["observed_deg"].size for p in pairs) == len(used)
    for p in pairs:
        assert p["observed_deg"].size > 20
        np.testing.assert_array_equal(p["observed_deg"],
                                      used["interval_deg"][used["cylinder"] == p["to_cyl"]])
