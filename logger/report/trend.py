"""The trend figure: one metric across runs, a line per cylinder or sensor."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from pathlib import Path

import matplotlib.dates as mdates
import numpy as np

from crankbeat.logger.report.style import CYLINDER_COLOURS, MISFIRE_COLOUR, new_figure, save
from crankbeat.logger.report.trend_data import TrendMarks
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
               rpm_band: str | None = None, marks: TrendMarks | None = None) -> Path:
    """Draw ``points`` (from :func:`logger.store.trend`) into the PNG at ``path``; with
    ``marks`` (:func:`logger.report.trend_data.trend_marks`) also error bars of ±1 standard
    error, the rig's limit lines, and hollow markers for runs not on equal terms."""
    marks = marks or TrendMarks()
    fig, ax = new_figure(9.5, 4.2)
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
        colour = CYLINDER_COLOURS[k % len(CYLINDER_COLOURS)]
        xs, ys = [x for _, x in pts], [p.value for p, _ in pts]
        err = [marks.stderr.get((p.run_id, p.series)) for p, _ in pts]
        ax.errorbar(xs, ys, yerr=[np.nan if e is None else e for e in err], marker="o", ms=4,
                    lw=1.2, capsize=3, elinewidth=0.8, color=colour, label=name)
        odd = [(x, p.value) for p, x in pts if p.run_id in marks.flags]
        if odd:
            ax.plot(*zip(*odd, strict=True), "o", ms=9, mfc="white", mec=colour, mew=1.4,
                    zorder=3)
        if not in_order:
            for p, x in pts[-12:]:
                ax.annotate(f"#{p.run_id}", (x, p.value), textcoords="offset points",
                            xytext=(3, 4), fontsize=7, color="#555555")
    for value, text in marks.limits:
        ax.axhline(value, color=MISFIRE_COLOUR, lw=1, ls="--", label=text or None)
    _flag_notes(ax, points, marks, run_x)
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
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    else:
        ax.text(0.5, 0.5, "no runs with data", transform=ax.transAxes, ha="center")
    if by != "odometer" and not in_order:
        locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    save(fig, path)
    return path


def _flag_notes(ax, points: Sequence[TrendPoint], marks: TrendMarks, run_x: dict) -> None:
    """Name the hollow (flagged) runs under the plot: "#4: wheel uncorrected"."""
    flagged = sorted({p.run_id for p in points if p.run_id in marks.flags})
    if not flagged:
        return
    text = "hollow: " + "; ".join(f"#{r} {', '.join(marks.flags[r])}" for r in flagged[:6])
    if len(flagged) > 6:
        text += f"; {len(flagged) - 6} more"
    ax.text(0.0, -0.32, text, transform=ax.transAxes, fontsize=7, color="#555555",
            va="top")
