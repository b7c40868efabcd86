"""Trend figure extras: standard errors, the rig's limit lines, runs not on equal terms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from test_store_fill import larch_like_rig, make_events

from crankbeat.dsp.events import FIRED
from crankbeat.logger.cli.main import main
from crankbeat.logger.report.style import saved_axes
from crankbeat.logger.report.trend import plot_trend
from crankbeat.logger.report.trend_data import binomial_stderr_pct, trend_marks
from crankbeat.logger.store import Store

CORRECTED = {"tooth_errors": {"applied_from_earlier_run": True, "applied_during_run": False}}
UNCORRECTED = {"tooth_errors": {"applied_from_earlier_run": False, "applied_during_run": False}}


@pytest.fixture
def history(tmp_path):
    """Three Larch-like runs: #1 fine, #2 on an uncorrected wheel, #3 by an older analyser."""
    path = tmp_path / "h.db"
    plan = [(10, CORRECTED, "0.2.0+r1"), (20, UNCORRECTED, "0.2.0+r1"),
            (40, CORRECTED, "0.1.9+r1")]
    events = {}
    with Store.open(path) as st:
        for day, (every, summary, analyser) in enumerate(plan, start=1):
            ev = make_events(600, misfire_every={2: every}, interval_offset={1: 0.5 * day},
                             seed=day, special=False)
            run = st.begin_run(larch_like_rig(), label=f"ride {day}", analyser=analyser,
                               started_at=f"2026-04-0{day}T08:00:00+00:00")
            st.add_events(run, ev)
            st.finish_run(run, summary)
            st.commit()
            events[run] = ev
    return path, events


def test_standard_errors_flags_and_limits(history, tmp_path):
    path, events = history
    with Store.open(path, create=False) as st:
        rates = st.trend("misfire_rate", rig="larch")
        errors = st.trend("interval_error", rig="larch")
        m_rate = trend_marks(st, rates, "misfire_rate")
        m_int = trend_marks(st, errors, "interval_error")
        png = plot_trend(errors, tmp_path / "t.png", metric="interval_error", marks=m_int)
    # binomial standard error of a proportion, sqrt(p (1 - p) / n) (handbook): cylinder 2 of
    # run 1 misses every 10th of its 600 cycles
    p = next(x for x in rates if x.run_id == 1 and x.series == "cyl 2")
    assert p.value == pytest.approx(10.0) and p.n == 600
    assert m_rate.stderr[(1, "cyl 2")] == pytest.approx(100 * np.sqrt(0.1 * 0.9 / 600))
    assert binomial_stderr_pct(0.0, 600) == 0.0 and binomial_stderr_pct(None, 0) is None
    # interval: standard error of the mean as scipy.stats.sem gives it on the same events
    ev = events[2]
    sel = ev[(ev["cylinder"] == 1) & (ev["verdict"] == FIRED) & np.isfinite(ev["interval_deg"])]
    ref = stats.sem(sel["interval_deg"] - sel["expected_interval_deg"])
    assert m_int.stderr[(2, "cyl 1")] == pytest.approx(ref, rel=1e-9)
    # flags: run 2's wheel was never corrected, run 3 came from an older analyser
    assert m_int.flags == {2: ["wheel uncorrected"], 3: ["analyser 0.1.9+r1"]}
    # limit lines from the rig ([limits] defaults: 2 % alert, ±3 deg tolerance)
    assert [v for v, _ in m_rate.limits] == [2.0]
    assert [v for v, _ in m_int.limits] == [3.0, -3.0]
    axes = saved_axes(png)
    assert axes[0]["ylabel"].startswith("interval error") and axes[0]["xlabel"]


def test_cli_table_says_which_runs_are_not_on_equal_terms(history, capsys, tmp_path):
    path, _ = history
    png = tmp_path / "cli.png"
    assert main(["trend", "misfire_rate", "--rig", "larch", "--store", str(path),
                 "--plot", str(png)]) == 0
    out = capsys.readouterr().out
    rows = {line.split()[0]: line for line in out.splitlines()[2:] if line.strip()[:1].isdigit()}
    assert rows["2"].rstrip().endswith("wheel uncorrected")
    assert rows["3"].rstrip().endswith("analyser 0.1.9+r1")
    assert rows["1"].rstrip().endswith("-")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG specification, section 3.1
