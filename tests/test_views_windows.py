"""The revolution-window figure: 200- and 1000-revolution windows against time into the ride,
with the alert level; the data behind it is dsp.analysis.window_rates on the stored events."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.cli.main import main
from crankbeat.logger.figures import window_timeline
from crankbeat.logger.report.run_plots import plot_windows
from crankbeat.logger.report.style import saved_axes
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parents[1]


def test_window_rates_by_hand_and_the_figure_is_labelled(tmp_path):
    # a 4-stroke turns twice per working cycle (common practice): 200 revolutions = 100 cycles
    ev = make_events(1000, misfire_every={2: 10}, special=False)
    with Store.open(tmp_path / "w.db") as st:
        run = fill_run(st, ev)
        tl200 = window_timeline(st, run, ev, revolutions=200)
        tl1000 = window_timeline(st, run, ev, revolutions=1000)
        png = plot_windows(st, run, ev, tmp_path / "w.png", alert_pct=2.0)
    # hand count: cylinder 2 misses 1 in 10 of its cycles -> 10 %; both cylinders -> 5 %
    assert len(tl200["rate_pct"]) == 10 and tl200["complete"].all()
    assert tl200["rate_pct"] == pytest.approx([5.0] * 10)
    assert tl200["per_cylinder"][:, 1] == pytest.approx([10.0] * 10)
    assert tl200["per_cylinder"][:, 0] == pytest.approx([0.0] * 10)
    assert len(tl1000["rate_pct"]) == 2
    # time axis: seconds into the ride (the synthetic run has no CAN start: its first event)
    assert tl200["t_start"][0] == 0.0
    assert np.all(np.diff(tl200["t_start"]) > 0) and np.all(tl200["t_end"] > tl200["t_start"])
    assert tl1000["t_end"][-1] == pytest.approx(float(ev["t"].max() - ev["t"].min()))
    axes = saved_axes(png)
    assert [a["xlabel"] for a in axes] == ["", "time into the ride [s]"]
    assert [a["ylabel"] for a in axes] == ["misfire rate [%]"] * 2
    assert axes[0]["title"].startswith("200-revolution") and \
        axes[1]["title"].startswith("1000-revolution")


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory, demo_ride):
    log, caps = demo_ride
    db = tmp_path_factory.mktemp("win") / "d.db"
    argv = ["replay", "--store", str(db), "--rig", "larch", "--can", str(log), "--json"]
    for cap in caps:
        argv += ["--accel", str(cap)]
    assert main(argv) == 0
    return db


def test_demo_windows_are_the_alert_figures_and_sit_in_the_scripted_burst(demo_db):
    with Store.open(demo_db, create=False) as st:
        ev = st.events(1)
        tl = window_timeline(st, 1, ev, revolutions=200)
        mis = st.run(1)["summary"]["misfire"]
    whole = tl["complete"] & np.isfinite(tl["rate_pct"])
    # the figure's worst whole window is the run's own alert figure
    assert float(np.max(tl["rate_pct"][whole])) == pytest.approx(mis["worst_rev200_pct"])
    script = tomllib.loads((ROOT / "fixtures/demo/demo.scenario.toml").read_text("utf-8"))
    starts = np.cumsum([0.0] + [s["duration"] for s in script["segment"]])
    i = [s["label"] for s in script["segment"]].index("misfire burst")
    over = whole & (tl["rate_pct"] > mis["alert_limit_pct"])
    assert over.any()
    # every window above the alert level overlaps the script's misfire burst (34 s .. 41 s) or
    # its 45 % partial-burn stretch right after it, which the detector counts as misfires (a
    # known shortfall of issue 10: no depth scale at that speed, read as a dead spell)
    j = [s["label"] for s in script["segment"]].index("partial burn")
    for a, b in zip(tl["t_start"][over], tl["t_end"][over], strict=True):
        assert (a < starts[i + 1] and b > starts[i]) or (a < starts[j + 1] and b > starts[j])
