"""Run and trend reports, made from a reopened store file alone."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import matplotlib.image as mpimg
import numpy as np
import pytest
from test_store_fill import fill_run, make_events

from crankbeat.logger.report import make_run_report, plot_trend
from crankbeat.logger.store import Store

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (RFC 2083), section 3.1


class _Images(HTMLParser):
    def __init__(self):
        super().__init__()
        self.srcs, self.titles = [], []
        self._in_h2 = False

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.srcs.append(dict(attrs)["src"])
        self._in_h2 = tag in ("h2", "h3")

    def handle_data(self, data):
        if self._in_h2:
            self.titles.append(data)
            self._in_h2 = False


@pytest.fixture
def filled(tmp_path):
    path = tmp_path / "rep.db"
    with Store.open(path) as st:
        fill_run(st, make_events(600, misfire_every={2: 40}, seed=7), label="first",
                 started_at="2026-04-01T08:00:00+00:00")
        vib = [{"sensor": "bar_left", "rpm_lo": lo, "rpm_hi": lo + 500, "axis": "sum",
                "weighting": "Wh", "rms": lo / 1000, "n": 500} for lo in range(3000, 7000, 500)]
        # a whole-run value has no rpm band (the pipeline writes one per sensor)
        vib.append({"sensor": "bar_left", "rpm_lo": None, "rpm_hi": None, "axis": "sum",
                    "weighting": "Wh", "rms": 4.2, "n": 4000})
        run = fill_run(st, make_events(600, misfire_every={2: 10}, seed=8), label="second",
                       started_at="2026-04-02T08:00:00+00:00", vibration=vib)
        orders = np.arange(0.5, 6.01, 0.5)
        st.add_order_map(run, sensor="bar_left", rpm_lo=np.arange(3000, 7000, 500.0),
                         rpm_hi=np.arange(3500, 7500, 500.0), orders=orders,
                         amplitude=np.outer(np.linspace(1, 2, 8), 1 / orders))
        st.commit()
    return path, run  # the store is closed: the report reads the file again


def test_run_report_embeds_every_figure(filled, tmp_path):
    path, run = filled
    with Store.open(path, create=False) as st:
        rep = make_run_report(st, run, tmp_path / "out")
    names = sorted(p.name for p in rep.figures)
    assert names == sorted(f"run{run}_{k}.png" for k in (
        "channels", "metric", "windows", "intervals", "contribution", "orders", "vibration",
        "trend_misfire"))
    parser = _Images()
    parser.feed(rep.html.read_text(encoding="utf-8"))
    assert len(parser.srcs) == len(rep.figures)
    for src, fig in zip(parser.srcs, rep.figures, strict=True):
        raw = base64.b64decode(src.split(",", 1)[1])
        assert raw == fig.read_bytes() and raw[:8] == PNG_SIGNATURE
        h, w = mpimg.imread(fig).shape[:2]
        assert w >= 500 and h >= 300  # readable size at 110 dpi
    assert "Firing intervals" in parser.titles
    assert "Summary" in parser.titles and "note: synthetic" in rep.html.read_text()
    # Self-contained: nothing is fetched from elsewhere (links within the folder only).
    assert not re.search(r"(src|href)=['\"](?!data:|#|index\.html)", rep.html.read_text())
    assert f"href='run{run}.html'" in (tmp_path / "out" / "index.html").read_text()


def test_a_run_without_data_says_what_is_missing(filled, tmp_path):
    path, _ = filled
    with Store.open(path) as st:
        from test_store_fill import larch_like_rig

        empty = st.begin_run(larch_like_rig(), label="killed-at-once")  # incomplete, no events
        rep = make_run_report(st, empty, tmp_path / "o2")
    text = rep.html.read_text()
    assert ("Not drawn (no data in the store): Channels on one time axis, Per-event metric, "
            "Misfire rate per 200 and 1000 revolutions, Firing intervals, Contribution per "
            "cylinder, Order map, Vibration against rpm") in text
    assert [p.name for p in rep.figures] == [f"run{empty}_trend_misfire.png"]
    assert "incomplete" in text


def test_window_rows_without_stored_windows_are_dsp_window_rates(tmp_path):
    # A 4-stroke turns twice per working cycle (common practice): 1000 revolutions = 500 cycles.
    # A run stored without windows gets dsp.analysis.window_rates on its events, with the
    # engine of its own stored rig: the report has no second way of counting windows.
    from crankbeat.dsp.analysis import window_rates
    from crankbeat.logger.figures import run_engine, window_rows

    ev = make_events(1500, misfire_every={2: 10}, special=False)
    with Store.open(tmp_path / "w.db") as st:
        run = fill_run(st, ev)
        assert st.windows(run) == []
        rows = [r for r in window_rows(st, run, ev, revolutions=1000) if r["cylinder"] == 2]
        windows, per_cyl = window_rates(ev, revolutions=1000, engine=run_engine(st, run))
    assert [r["idx"] for r in rows] == [0, 1, 2]
    # every 10th cycle of cylinder 2 misfires -> 50 of 500 = 10 %
    assert [r["rate"] for r in rows] == pytest.approx([10.0, 10.0, 10.0])
    assert [r["rate"] for r in rows] == pytest.approx(per_cyl[:, 1].tolist())
    assert [r["complete"] for r in rows] == windows["complete"].tolist()


def test_trend_plot_by_odometer(tmp_path):
    path = tmp_path / "t.db"
    with Store.open(path) as st:
        for i, km in enumerate((1200.0, 800.0, 1600.0)):
            fill_run(st, make_events(200, misfire_every={1: 5 + i}), odometer_km=km)
        pts = st.trend("misfire_rate", by="odometer")
    out = plot_trend(pts, tmp_path / "trend.png", metric="misfire_rate", by="odometer")
    assert out.read_bytes()[:8] == PNG_SIGNATURE
    empty = plot_trend([], tmp_path / "empty.png", metric="contribution")
    assert empty.read_bytes()[:8] == PNG_SIGNATURE
