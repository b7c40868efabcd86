"""The order map's predicted-order marks, its rpm grid and the order cuts."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.figures import main_orders, order_cuts, order_grid, predicted_order_marks
from crankbeat.logger.report.run_plots import plot_order_map
from crankbeat.logger.report.style import saved_axes
from crankbeat.logger.rig.loader import load_rig
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parents[1]


def _orders(rig: str) -> dict[float, list[str]]:
    engine = load_rig(rig).engine
    return {m["order"]: m["sources"] for m in predicted_order_marks(engine, max_order=6.0)}


def test_marks_follow_the_layout():
    # a 4-stroke fires each cylinder once per two revolutions; uneven intervals (270/450 deg)
    # excite the half orders, even ones only multiples of the firing rate (common practice)
    larch = _orders("larch")
    assert {1.5, 2.5} <= set(larch) and "firing pulses" in larch[1.5]
    # a parallel twin with pins 270 deg apart leaves a first-order free couple and force
    # unbalanced (handbook balance of a two-cylinder crank, from memory)
    assert "free force" in larch[1.0] or "free couple" in larch[1.0]
    # flat-plane inline four, firing every 180 deg: orders 2, 4, 6 from the firing pulses and an
    # unbalanced second-order free force; no half or first order (handbook balance tables)
    alder = _orders("alder")
    assert sorted(alder) == [2.0, 4.0, 6.0]
    assert "free force" in alder[2.0]
    # twin firing every 360 deg (fixtures/twin-360): no half orders
    twin360 = _orders(str(ROOT / "fixtures/twin-360/rig.toml"))
    assert all(float(o).is_integer() for o in twin360) and 1.0 in twin360
    assert main_orders(predicted_order_marks(load_rig("alder").engine, max_order=6.0)) == \
        [2.0, 4.0, 6.0]


def test_grid_has_equal_bands_and_cuts_read_the_stored_amplitudes(tmp_path):
    orders = np.arange(0.5, 6.01, 0.5)
    # a coarse low band (1000-2000) below 500-rpm bands: the grid must not draw it coarser
    lo = np.array([1000.0, 2000.0, 2500.0, 3000.0])
    hi = np.array([2000.0, 2500.0, 3000.0, 3500.0])
    scale = np.array([1.0, 2.0, 3.0, 4.0])
    with Store.open(tmp_path / "o.db") as st:
        run = fill_run(st, make_events(50))
        st.add_order_map(run, sensor="seat", rpm_lo=lo, rpm_hi=hi, orders=orders,
                         amplitude=np.outer(scale, 1 / orders))
        st.commit()
        grid = order_grid(st, run, "seat", "sum", max_order=8.0)  # add_order_map's axis
        png = plot_order_map(st, run, tmp_path / "o.png")
    assert np.diff(grid["rpm_edges"]) == pytest.approx([500.0] * 5)
    # the low band's value fills both of its 500-rpm rows
    j = int(np.flatnonzero(grid["orders"] == 2.0)[0])
    assert grid["amplitude"][:2, j] == pytest.approx([0.5, 0.5])
    cuts = order_cuts(grid, [2.0, 1.5])
    rpm, amp = cuts[2.0]
    assert rpm.tolist() == [1250.0, 1750.0, 2250.0, 2750.0, 3250.0]
    assert amp == pytest.approx(np.array([1, 1, 2, 3, 4]) / 2.0)  # amplitude = scale / order
    # the larch-like twin-270 predicts the half order 1.5: it is in the data behind the plot
    assert cuts[1.5][1] == pytest.approx(np.array([1, 1, 2, 3, 4]) / 1.5)
    axes = saved_axes(png)
    labels = {(a["xlabel"], a["ylabel"]) for a in axes}
    assert ("engine order [per crank revolution]", "engine speed [rpm]") in labels
    assert ("engine speed, band centre [rpm]", "amplitude [m/s²]") in labels


def test_demo_first_order_grows_with_engine_speed(tmp_path, demo_ride):
    from crankbeat.logger.cli.main import main

    log, caps = demo_ride
    db = tmp_path / "d.db"
    argv = ["replay", "--store", str(db), "--rig", "larch", "--can", str(log), "--json"]
    for cap in caps:
        argv += ["--accel", str(cap)]
    assert main(argv) == 0
    with Store.open(db, create=False) as st:
        grid = order_grid(st, 1, "bar_left", "sum", max_order=8.0)
    assert np.diff(grid["rpm_edges"]) == pytest.approx([500.0] * (len(grid["rpm_edges"]) - 1))
    rpm, amp = order_cuts(grid, [1.0])[1.0]
    # the reciprocating inertia force is m r w^2 (handbook): from 1250 to 7250 rpm w^2 grows
    # (7250/1250)^2 = 34 times; the bar's response shapes it, but the rise must be steep
    assert amp[np.argmax(rpm)] / amp[np.argmin(rpm)] > 10.0
