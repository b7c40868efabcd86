"""The trend figure: one metric across runs, a line per cylinder or sensor."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from pathlib import Path

import matplotlib.dates as mdates

from crankbeat.logger.report.style import CYLINDER_COLOURS, new_figure, save
from crankbeat.logger.store import METRICS, TrendPoint

_LABELS = {
    "misfire_rate": "misfire rate [%]",
    "interval_error": "interval error, observed − expected [deg]",
    "bar_vibration": "bar vibration, Wh-weighted r.m.s. [m/s²]",
    "contribution": "contribution (1 = cylinder mean)",
}


def _x(p: TrendPoint, by: str):
    if by == "odometer":
        return p.odometer_km
    try:
        return datetime.fromisoformat(p.started_at)
    except ValueError:
        return None


def plot_trend(points: Sequence[TrendPoint], path: Path, *, metric: str, by: str = "date",
               rpm_band: str | None = None) -> Path:
    """Draw ``points`` (from :func:`logger.store.trend`) into the PNG at ``path``."""
    fig, ax = new_figure(8.0, 3.8)
    series = sorted({p.series for p in points})
    # runs that share a start time (or odometer reading) would sit on one spot: then the runs
    # are drawn in order, one tick each
    run_x = {p.run_id: _x(p, by) for p in points}
    known = [x for x in run_x.values() if x is not None]
    in_order = len(set(known)) < len(known)
    if in_order:
        order = sorted(run_x, key=lambda r: (run_x[r] is None, run_x[r] or 0, r))
        run_x = {r: i for i, r in enumerate(order)}
    for k, name in enumerate(series):
        pts = [(p, run_x[p.run_id]) for p in points if p.series == name and p.value is not None]
        pts = [(p, x) for p, x in pts if x is not None]
        if not pts:
            continue
        ax.plot([x for _, x in pts], [p.value for p, _ in pts], marker="o", ms=4, lw=1.2,
                color=CYLINDER_COLOURS[k % len(CYLINDER_COLOURS)], label=name)
        if not in_order:
            for p, x in pts[-12:]:
                ax.annotate(f"#{p.run_id}", (x, p.value), textcoords="offset points",
                            xytext=(3, 4), fontsize=7, color="#555555")
    if in_order:
        ax.set_xticks(list(run_x.values()), [f"#{r}" for r in run_x])
        ax.set_xlabel("run (in order of " + ("odometer" if by == "odometer" else "start") +
                      "; some runs share one)")
    else:
        ax.set_xlabel("odometer [km]" if by == "odometer" else "run start (UTC)")
    ax.set_ylabel(_LABELS.get(metric, f"{metric} [{METRICS.get(metric, ('',))[0]}]"))
    title = f"{_LABELS.get(metric, metric).split(' [')[0].capitalize()} across runs"
    if rpm_band:
        title += f", {rpm_band} rpm"
    ax.set_title(title)
    if series:
        ax.legend(loc="best")
    else:
        ax.text(0.5, 0.5, "no runs with data", transform=ax.transAxes, ha="center")
    if by != "odometer" and not in_order:
        locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    save(fig, path)
    return path
