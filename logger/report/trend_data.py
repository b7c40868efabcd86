"""What the trend figure draws beside the values (:func:`logger.store.trend`): each point's
standard error, the runs whose figures are not on equal terms (wheel uncorrected, another
analyser version), and the rig's limit lines."""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.events import FIRED
from crankbeat.logger.figures import wheel_corrected
from crankbeat.logger.store import Store, TrendPoint
from crankbeat.logger.store.trend import event_filter


@dataclass
class TrendMarks:
    """``stderr``: (run, series) -> standard error of the value (None: not known);
    ``flags``: run -> reasons its value is not on equal terms; ``limits``: (value, label)."""

    stderr: dict[tuple[int, str], float | None] = field(default_factory=dict)
    flags: dict[int, list[str]] = field(default_factory=dict)
    limits: list[tuple[float, str]] = field(default_factory=list)


def binomial_stderr_pct(rate_pct: float | None, n: int) -> float | None:
    """Standard error of a rate from n trials, in % (binomial: sqrt(p (1 - p) / n))."""
    if rate_pct is None or n <= 0:
        return None
    p = rate_pct / 100.0
    return 100.0 * math.sqrt(max(p * (1.0 - p), 0.0) / n)


def _cylinder(series: str) -> int | None:
    m = re.match(r"cyl (\d+)", series)
    return int(m.group(1)) if m else None


def _event_stderr(store: Store, run_id: int, cylinder: int, column: str,
                  band: tuple[float, float] | None) -> float | None:
    """Standard error of the mean (s / sqrt(n)) of a per-event column over fired events."""
    expr = "interval_deg - expected_interval_deg" if column == "interval" else "contribution"
    where, params = event_filter(store, run_id, cylinder=cylinder, band=band,
                                 intervals=column == "interval")
    where += [f"verdict = {FIRED}", f"({expr}) IS NOT NULL"]
    values = np.array([r[0] for r in store.db.execute(
        f"SELECT {expr} FROM events WHERE {' AND '.join(where)}", params).fetchall()], float)
    values = values[np.isfinite(values)]
    if values.size < 2:
        return None
    return float(np.std(values, ddof=1) / math.sqrt(values.size))


def _stderr(store: Store, metric: str, p: TrendPoint, band) -> float | None:
    cyl = _cylinder(p.series)
    if metric == "misfire_rate":
        return binomial_stderr_pct(p.value, p.n)
    if cyl is None or metric not in ("interval_error", "contribution"):
        return None  # bar vibration: one r.m.s. over the whole run, no spread kept
    if metric == "interval_error" and band is None:
        stored = [r["stderr_deg"] for r in store.intervals(p.run_id) if r["to_cyl"] == cyl]
        if stored and stored[0] is not None and math.isfinite(stored[0]):
            return float(stored[0])
    return _event_stderr(store, p.run_id, cyl, "interval" if metric == "interval_error"
                         else "contribution", band)


def trend_marks(store: Store, points: Sequence[TrendPoint], metric: str, *,
                rpm_band: tuple[float, float] | None = None,
                current_analyser: str | None = None) -> TrendMarks:
    """Standard errors, flags and limit lines for ``points``. A run is flagged when its wheel's
    tooth errors were never corrected (its intervals carry them) or when another analyser
    version than ``current_analyser`` (default: the newest among the runs) produced it."""
    marks = TrendMarks()
    for p in points:
        marks.stderr[(p.run_id, p.series)] = _stderr(store, metric, p, rpm_band)
    runs = {p.run_id: store.run(p.run_id) for p in points}
    versions = {r.get("analyser") for r in runs.values() if r.get("analyser")}
    if current_analyser is None and versions:
        current_analyser = max(versions, key=_version_key)
    for run_id, info in runs.items():
        flags = []
        if not wheel_corrected(info.get("summary")):
            flags.append("wheel uncorrected")
        if info.get("analyser") and current_analyser and info["analyser"] != current_analyser:
            flags.append(f"analyser {info['analyser']}")
        if flags:
            marks.flags[run_id] = flags
    if runs:
        marks.limits = _limits(store, next(iter(runs)), metric)
    return marks


def _version_key(text: str) -> tuple:
    return tuple(int(x) if x.isdigit() else x for x in re.split(r"[.+r]+", text) if x)


def _limits(store: Store, run_id: int, metric: str) -> list[tuple[float, str]]:
    from crankbeat.logger.report.run import rig_limits

    limits = rig_limits(store.rig_toml(run_id))
    if metric == "misfire_rate":
        return [(limits["misfire_alert_pct"], f"rig alert level {limits['misfire_alert_pct']:g} "
                 "% (judged on 200-rev windows)")]
    if metric == "interval_error":
        tol = limits["interval_tolerance_deg"]
        return [(tol, f"rig tolerance ±{tol:g}°"), (-tol, "")]
    return []
