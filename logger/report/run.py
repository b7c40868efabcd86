"""One run's report: the PNG figures and a single HTML page that embeds them."""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from crankbeat.errors import CrankbeatError
from crankbeat.logger.figures import (
    cylinder_pairs,
    interval_error_by_cylinder,
    ride_start,
    run_engine,
)
from crankbeat.logger.report import channel_plots, page, run_plots
from crankbeat.logger.report.trend import plot_trend
from crankbeat.logger.report.trend_data import trend_marks
from crankbeat.logger.store import Store


@dataclass
class RunReport:
    """What :func:`make_run_report` wrote."""

    run_id: int
    html: Path
    figures: list[Path] = field(default_factory=list)


def rig_limits(rig_toml: str) -> dict[str, float]:
    """The rig's [limits] as stored with the run (model defaults where the file is silent)."""
    from crankbeat.logger.rig.model import Limits

    base = {"misfire_alert_pct": Limits.misfire_alert_pct,
            "interval_tolerance_deg": Limits.interval_tolerance_deg}
    try:
        given = tomllib.loads(rig_toml).get("limits", {})
    except tomllib.TOMLDecodeError:
        return base
    for key in base:
        if isinstance(given.get(key), int | float):
            base[key] = float(given[key])
    return base


def make_run_report(store: Store, run_id: int, out_dir: str | Path) -> RunReport:
    """Write ``run<ID>_*.png`` and ``run<ID>.html`` into ``out_dir`` (created if needed)."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CrankbeatError(f"cannot create report folder '{out}': {exc.strerror}") from None
    info = store.run(run_id)
    ev = store.events(run_id)
    limits = rig_limits(store.rig_toml(run_id))
    stem = f"run{run_id}"
    names = cylinder_pairs(store, run_id)
    figures: list[tuple[str, Path | None]] = [
        ("Channels on one time axis",
         channel_plots.plot_channels(store, run_id, out / f"{stem}_channels.png")),
        ("Per-event metric", run_plots.plot_metric(
            ev, out / f"{stem}_metric.png", names=names, t0=ride_start(store, run_id, ev))),
        ("Misfire rate per 200 and 1000 revolutions", run_plots.plot_windows(
            store, run_id, ev, out / f"{stem}_windows.png",
            alert_pct=limits.get("misfire_alert_pct"), names=names)),
        ("Firing intervals", run_plots.plot_intervals(
            ev, out / f"{stem}_intervals.png", engine=run_engine(store, run_id),
            tolerance_deg=limits.get("interval_tolerance_deg"), summary=info.get("summary"),
            checked=interval_error_by_cylinder(store, run_id), names=names)),
        ("Contribution per cylinder",
         run_plots.plot_contribution(ev, out / f"{stem}_contribution.png")),
        ("Order map", run_plots.plot_order_map(store, run_id, out / f"{stem}_orders.png")),
        ("Vibration against rpm",
         run_plots.plot_vibration(store, run_id, out / f"{stem}_vibration.png")),
    ]
    points = store.trend("misfire_rate", rig=info["rig"], last=30)
    if len({p.run_id for p in points}) > 1:
        figures.append(("Misfire rate across the runs of this rig", plot_trend(
            points, out / f"{stem}_trend_misfire.png", metric="misfire_rate",
            marks=trend_marks(store, points, "misfire_rate"))))
    html_path = out / f"{stem}.html"
    drawn = [(title, p) for title, p in figures if p is not None]
    missing = [t for t, p in figures if p is None]
    html_path.write_text(page.run_page(store, run_id, ev, drawn, missing), encoding="utf-8")
    _write_index(out)
    return RunReport(run_id, html_path, [p for _, p in drawn])


def _write_index(out: Path) -> None:
    """``index.html``: every run page in the folder (several runs may share one) with its
    headline figures."""
    (out / "index.html").write_text(page.index_page(out), encoding="utf-8")
