"""Trend queries: one number per run (and per cylinder or sensor) across the run history.

Metrics (computed from the stored rows, so that runs of different crankbeat versions compare on
the same terms; the summary gives only where a tooth-error correction started):

``misfire_rate``
    % misfires of the counted events (fired, partial burn, misfire; masked, unusable and
    fuel-cut events are not counted), per cylinder. Filters: ``cylinder``, ``rpm_band`` (event rpm).
``interval_error``
    Observed minus expected firing interval, degrees, per cylinder (the interval that ends at
    that cylinder's firing): the run's interval check, as ``show`` prints it; with ``rpm_band``,
    the mean over the fired events in the band from the run's tooth-error correction on.
    Filters: ``cylinder``, ``rpm_band``.
``bar_vibration``
    Hand-arm weighted (Wh) r.m.s. vector sum at the bar sensors, m/s², per sensor; bands inside
    ``rpm_band`` are pooled by energy (sqrt of the sample-weighted mean square). Without a band,
    the run's whole-run row when it has one, else all its bands pooled.
``contribution``
    Mean relative contribution of fired events (1.0 = cylinder mean), per cylinder.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

from crankbeat.dsp.events import COUNTED_VERDICTS, FIRED, MISFIRE
from crankbeat.errors import UsageError
from crankbeat.logger.store.channel_filter import channel_event_metric, parse_channel_filter
from crankbeat.logger.store.versions import pick_analyses

if TYPE_CHECKING:
    from crankbeat.logger.store.store import Store

Metric = Literal["misfire_rate", "interval_error", "bar_vibration", "contribution"]

METRICS: dict[str, tuple[str, str]] = {
    "misfire_rate": ("%", "misfires per counted event, per cylinder"),
    "interval_error": ("deg", "observed minus expected firing interval, per cylinder"),
    "bar_vibration": ("m/s²", "Wh-weighted r.m.s. vector sum at the bar, per sensor"),
    "contribution": ("", "mean relative contribution of fired events, per cylinder"),
}


@dataclass(frozen=True)
class TrendPoint:
    """One value of a trend: a run and a series (e.g. "cyl 2" or a sensor name)."""

    run_id: int
    label: str | None
    started_at: str
    odometer_km: float | None
    status: str
    series: str
    value: float | None
    n: int
    unit: str
    rig: str | None = None


_BAND = re.compile(r"^\s*(\d+(?:\.\d*)?)\s*-\s*(\d+(?:\.\d*)?)\s*$")


def parse_rpm_band(text: str) -> tuple[float, float]:
    """``"5000-6000"`` -> ``(5000.0, 6000.0)``; anything else is a :class:`UsageError`."""
    m = _BAND.match(str(text))
    if not m:
        raise UsageError(f"bad rpm band '{text}': expected LO-HI in rpm, e.g. 5000-6000")
    lo, hi = float(m.group(1)), float(m.group(2))
    if not lo < hi:
        raise UsageError(f"bad rpm band '{text}': the low end must be below the high end")
    return lo, hi


def _runs(store: Store, rig: str | None, by: str, last: int | None,
          analyser: str | None = None, tags: dict[str, str] | None = None) -> list[dict]:
    where, params = [], []
    if rig:
        where.append("rigs.name = ?")
        params.append(rig)
    if by == "odometer":
        where.append("runs.odometer_km IS NOT NULL")
        order = "runs.odometer_km, runs.id"
    else:
        order = "runs.started_at, runs.id"
    sql = (
        "SELECT runs.id, runs.label, runs.started_at, runs.odometer_km, runs.status, rigs.toml,"
        " rigs.name AS rig, EXISTS (SELECT 1 FROM events e WHERE e.run = runs.id) AS n_events"
        " FROM runs JOIN rigs ON rigs.id = runs.rig_id"
        f"{' WHERE ' + ' AND '.join(where) if where else ''} ORDER BY {order}"
    )
    rows = list(store.db.query(sql, params))
    shown = pick_analyses(store, [r["id"] for r in rows], analyser)
    rows = [r for r in rows if r["id"] in shown]
    if tags:
        from crankbeat.logger.store.labels import runs_with_tags

        keep = runs_with_tags(store, tags)
        rows = [r for r in rows if r["id"] in keep]
    rows = [r for r in rows if r["n_events"]]  # failed or empty runs have nothing to trend
    return rows[-last:] if last else rows


def _bar_sensors(rig_toml: str) -> set[str] | None:
    """Names of the rig's bar sensors (None when the stored rig text cannot be read)."""
    try:
        doc = tomllib.loads(rig_toml)
    except tomllib.TOMLDecodeError:
        return None
    return {s.get("name") for s in doc.get("serial", []) if s.get("location") == "bar"}


def trend(
    store: Store,
    metric: Metric,
    *,
    rig: str | None = None,
    cylinder: int | None = None,
    rpm_band: str | tuple[float, float] | None = None,
    by: Literal["date", "odometer"] = "date",
    last: int | None = None,
    channel: str | None = None,
    analyser: str | None = None,
    tags: dict[str, str] | None = None,
) -> list[TrendPoint]:
    """Values of ``metric`` per run, in ``by`` order (runs without an odometer reading are left
    out of ``by="odometer"``); ``last`` keeps the last N runs of that order; ``tags`` keeps the
    runs carrying all of them.

    A ride analysed several times counts once: its newest analysis, or the one of ``analyser``
    (then only runs of that analyser version). ``channel`` filters events by a status channel,
    ``"gear=3"`` or ``"coolant=80-95"`` (:mod:`logger.store.channel_filter`).

    Runs of different rigs never share one trend (a twin's cylinder 2 is not a four's): without
    ``rig`` the store must hold runs of one rig only, else a :class:`UsageError` names them."""
    if metric not in METRICS:
        raise UsageError(f"unknown trend metric '{metric}', expected one of {', '.join(METRICS)}")
    if by not in ("date", "odometer"):
        raise UsageError(f"bad --by '{by}', expected date or odometer")
    if last is not None and last < 1:
        raise UsageError(f"--last must be >= 1, got {last}")
    if cylinder is not None and metric == "bar_vibration":
        raise UsageError("--cylinder does not apply to bar_vibration (it is per sensor)")
    band = parse_rpm_band(rpm_band) if isinstance(rpm_band, str) else rpm_band
    flt = parse_channel_filter(channel) if channel is not None else None
    if flt is not None and metric == "bar_vibration":
        raise UsageError("a channel filter applies to event metrics, not to bar_vibration")
    unit = METRICS[metric][0]
    out: list[TrendPoint] = []
    runs = _runs(store, rig, by, last, analyser, tags)
    rigs = sorted({r["rig"] for r in runs})
    if len(rigs) > 1:
        raise UsageError(f"the runs are of {len(rigs)} rigs ({', '.join(rigs)}): a trend follows "
                         "one rig, give --rig NAME")
    for run in runs:
        if metric == "bar_vibration":
            values = _bar_vibration(store, run, band)
        elif flt is not None:
            values = channel_event_metric(store, metric, run["id"], cylinder, band, flt)
        elif metric == "interval_error" and band is None:
            values = _checked_intervals(store, run["id"], cylinder)
        else:
            values = _event_metric(store, metric, run["id"], cylinder, band)
        if metric != "bar_vibration":  # phase unknown: a cylinder is named with its partner
            from crankbeat.logger.figures import cylinder_name, cylinder_pairs

            pairs = cylinder_pairs(store, run["id"])
            values = [(f"cyl {cylinder_name(int(s.split()[1]), pairs)}", v, n)
                      for s, v, n in values]
        for series, value, n in values:
            out.append(
                TrendPoint(run["id"], run["label"], run["started_at"], run["odometer_km"],
                           run["status"], series, value, n, unit, run["rig"])
            )
    return out


def _checked_intervals(store: Store, run_id: int, cylinder: int | None
                       ) -> list[tuple[str, float | None, int]]:
    """The run's interval check, the figure ``show`` prints (see :mod:`logger.figures`)."""
    from crankbeat.logger.figures import interval_error_by_cylinder

    checked = interval_error_by_cylinder(store, run_id)
    if not checked:  # a run stored without an interval check: from its events
        return _event_metric(store, "interval_error", run_id, cylinder, None)
    return [(f"cyl {c}", err, n) for c, (err, n) in sorted(checked.items())
            if cylinder is None or c == cylinder]


def event_filter(store: Store, run_id: int, *, cylinder: int | None = None,
                 band: tuple[float, float] | None = None, intervals: bool = False
                 ) -> tuple[list[str], list]:
    """WHERE clauses and their parameters for a run's events behind a per-event trend figure:
    the run, one cylinder, an rpm band, and for intervals only the events after a mid-run
    tooth-error correction (the ones before it carry the wheel's errors)."""
    where, params = ["run = ?"], [run_id]
    if intervals:
        from crankbeat.logger.figures import intervals_from_t  # figures imports the store

        t0 = intervals_from_t(store.run(run_id).get("summary"))
        if t0 is not None:
            where.append("t >= ?")
            params.append(t0)
    if cylinder is not None:
        where.append("cylinder = ?")
        params.append(int(cylinder))
    if band is not None:
        where.append("rpm >= ? AND rpm < ?")
        params.extend(band)
    return where, params


def _event_metric(store: Store, metric: str, run_id: int, cylinder: int | None,
                  band: tuple[float, float] | None) -> list[tuple[str, float | None, int]]:
    where, params = event_filter(store, run_id, cylinder=cylinder, band=band,
                                 intervals=metric == "interval_error")
    if metric == "misfire_rate":
        expr = (f"SUM(verdict = {MISFIRE}),"
                f" SUM(verdict IN ({', '.join(str(v) for v in COUNTED_VERDICTS)}))")
    elif metric == "interval_error":
        expr = (f"AVG(CASE WHEN verdict = {FIRED} THEN interval_deg - expected_interval_deg END),"
                f" SUM(verdict = {FIRED} AND interval_deg IS NOT NULL"
                " AND expected_interval_deg IS NOT NULL)")
    else:
        expr = (f"AVG(CASE WHEN verdict = {FIRED} THEN contribution END),"
                f" SUM(verdict = {FIRED} AND contribution IS NOT NULL)")
    rows = store.db.execute(
        f"SELECT cylinder, {expr} FROM events WHERE {' AND '.join(where)}"
        " GROUP BY cylinder ORDER BY cylinder", params
    ).fetchall()
    out = []
    for cyl, a, n in rows:
        n = int(n or 0)
        if metric == "misfire_rate":
            value = 100.0 * a / n if n else None
        else:
            value = float(a) if a is not None and n else None
        out.append((f"cyl {cyl}", value, n))
    return out


def _bar_vibration(store: Store, run: dict, band: tuple[float, float] | None
                   ) -> list[tuple[str, float | None, int]]:
    where, params = ["run = ?", "weighting = 'Wh'"], [run["id"]]
    if band is not None:
        where.append("rpm_lo >= ? AND rpm_hi <= ?")
        params.extend(band)
    rows = store.db.execute(
        f"SELECT sensor, rpm_lo, axis, rms, n FROM vibration WHERE {' AND '.join(where)}", params
    ).fetchall()
    bar = _bar_sensors(run["toml"])
    per: dict[str, dict[float, dict[str, tuple[float, int]]]] = {}
    for sensor, lo, axis, rms, n in rows:
        if bar is not None and sensor not in bar:
            continue
        if rms is None:
            continue
        per.setdefault(sensor, {}).setdefault(lo, {})[axis] = (float(rms), int(n or 0))
    out = []
    for sensor in sorted(per):
        bands = per[sensor]
        # A whole-run row (no rpm band) is the run's own value: bands would count it twice.
        if None in bands:
            bands = {None: bands[None]}
        energy, count = 0.0, 0
        for axes in bands.values():
            if "sum" in axes:
                rms, n = axes["sum"]
            else:
                # ISO 5349-1 vibration total value: root sum of squares of the axis values.
                rms = math.sqrt(sum(v[0] ** 2 for v in axes.values()))
                n = min(v[1] for v in axes.values())
            energy += n * rms**2
            count += n
        out.append((sensor, math.sqrt(energy / count) if count else None, count))
    return out
