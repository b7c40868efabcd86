"""One run's report: the PNG figures and a single HTML page that embeds them."""

from __future__ import annotations

import base64
import html
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from crankbeat.errors import CrankbeatError
from crankbeat.logger.figures import (
    cylinder_name,
    cylinder_pairs,
    interval_error_by_cylinder,
    wheel_corrected,
)
from crankbeat.logger.report import run_plots
from crankbeat.logger.report.text import summary_lines
from crankbeat.logger.report.trend import plot_trend
from crankbeat.logger.store import Store


@dataclass
class RunReport:
    """What :func:`make_run_report` wrote."""

    run_id: int
    html: Path
    figures: list[Path] = field(default_factory=list)


def _limits(rig_toml: str) -> dict[str, float]:
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
    limits = _limits(store.rig_toml(run_id))
    stem = f"run{run_id}"
    names = cylinder_pairs(store, run_id)
    figures: list[tuple[str, Path | None]] = [
        ("Per-event metric", run_plots.plot_metric(ev, out / f"{stem}_metric.png", names=names)),
        ("Misfire rate per 1000 revolutions", run_plots.plot_windows(
            store, run_id, ev, out / f"{stem}_windows.png",
            alert_pct=limits.get("misfire_alert_pct"), names=names)),
        ("Firing intervals", run_plots.plot_intervals(
            ev, out / f"{stem}_intervals.png", tolerance_deg=limits.get("interval_tolerance_deg"),
            summary=info.get("summary"), checked=interval_error_by_cylinder(store, run_id))),
        ("Contribution per cylinder",
         run_plots.plot_contribution(ev, out / f"{stem}_contribution.png")),
        ("Order map", run_plots.plot_order_map(store, run_id, out / f"{stem}_orders.png")),
        ("Vibration against rpm",
         run_plots.plot_vibration(store, run_id, out / f"{stem}_vibration.png")),
    ]
    points = store.trend("misfire_rate", rig=info["rig"], last=30)
    if len({p.run_id for p in points}) > 1:
        figures.append(("Misfire rate across the runs of this rig", plot_trend(
            points, out / f"{stem}_trend_misfire.png", metric="misfire_rate")))
    page = out / f"{stem}.html"
    drawn = [(title, p) for title, p in figures if p is not None]
    page.write_text(_page(store, run_id, info, drawn, [t for t, p in figures if p is None]),
                    encoding="utf-8")
    _write_index(out)
    return RunReport(run_id, page, [p for _, p in drawn])


def _write_index(out: Path) -> None:
    """``index.html``: links to every run page in the folder (several runs may share one)."""
    pages = sorted(out.glob("run*.html"), key=lambda p: int("".join(filter(str.isdigit, p.stem))
                                                            or 0))
    links = "".join(f"<li><a href='{html.escape(p.name)}'>{html.escape(p.stem)}</a></li>"
                    for p in pages)
    (out / "index.html").write_text(
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>crankbeat reports</title><style>{_CSS}</style></head><body>"
        f"<h1>crankbeat reports in this folder</h1><ul>{links}</ul></body></html>",
        encoding="utf-8")


_CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 1050px; color: #1d2327; }
h1 { font-size: 1.4em; border-bottom: 3px solid #2bb3a3; padding-bottom: .2em; }
h2 { font-size: 1.1em; margin-top: 1.6em; color: #1f6f8b; }
table { border-collapse: collapse; margin: .5em 0; font-size: .9em; }
td, th { border: 1px solid #d4d9dd; padding: .25em .6em; text-align: right; }
th { background: #eef3f5; } td.l, th.l { text-align: left; }
.off { color: #c0262d; font-weight: bold; } .muted { color: #7f8a93; }
img { max-width: 100%; border: 1px solid #e3e6e8; }
pre { background: #f6f8f9; padding: .6em; font-size: .85em; white-space: pre-wrap; }
"""


def _e(v: object) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.3f}"
    return html.escape(str(v))


def _table(headers: list[str], rows: list[list[object]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in headers)
    body = "".join(
        "<tr>" + "".join(f"<td class='off'>{_e(c)}</td>" if c == "OFF" else f"<td>{_e(c)}</td>"
                         for c in r) + "</tr>" for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _page(store: Store, run_id: int, info: dict, figures: list[tuple[str, Path]],
          missing: list[str]) -> str:
    cyl = store.cylinder_stats(run_id)
    pairs = cylinder_pairs(store, run_id)
    corrected = wheel_corrected(info.get("summary"))
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>crankbeat run {run_id}</title><style>{_CSS}</style></head><body>",
        f"<h1>crankbeat run {run_id}: {_e(info['label'] or info['started_at'])}</h1>",
        _table(["rig", "started (UTC)", "status", "odometer km", "notes"],
               [[info["rig"], info["started_at"], info["status"], info["odometer_km"],
                 info["notes"]]]),
        "<h2>Sources</h2>",
        _table(["kind", "path", "bytes", "sha256"],
               [[s["kind"], s["path"], s["bytes"], s["sha256"][:16] + "…"]
                for s in info["sources"]]),
        "<h2>Per cylinder</h2>",
        _table(["cyl", "events", "fired", "misfires", "rate %", "masked", "unusable",
                "fuel cut", "contribution", "interval error deg"],
               [[cylinder_name(c["cylinder"], pairs), c["events"], c["fired"], c["misfires"],
                 c["rate_pct"], c["masked"], c["unusable"], c["fuel_cut"], c["contribution"],
                 c["interval_error_deg"]] for c in cyl]),
    ]
    if pairs:
        parts.append("<p class='muted'>720° phase unknown (no cam, even firing): '2/3' is "
                     "cylinder 2, or 3 if the phase is the other way round.</p>")
    if not corrected:
        parts.append("<p class='off'>Interval figures UNCORRECTED: this run's wheel tooth "
                     "spacing errors were never learnt; they include them.</p>")
    intervals = store.intervals(run_id)
    if intervals:
        parts += ["<h2>Firing intervals</h2>", _table(
            ["from", "to", "expected deg", "observed deg", "± deg", "n", "check"],
            [[i["from_cyl"], i["to_cyl"], i["expected_deg"], i["observed_deg"],
              i["stderr_deg"], i["n"],
              ("OFF" if i["flagged"] else "ok") if corrected else "not judged"]
             for i in intervals])]
    lines = summary_lines(info.get("summary"), started_at=info.get("started_at"))
    if lines:
        parts += ["<h2>Summary</h2>", f"<pre>{html.escape(chr(10).join(lines))}</pre>"]
    for title, path in figures:
        data = base64.b64encode(path.read_bytes()).decode("ascii")
        parts.append(f"<h2>{html.escape(title)}</h2>"
                     f"<img alt='{html.escape(title)}' src='data:image/png;base64,{data}'>")
    judged = ((info.get("summary") or {}).get("misfire") or {}).get("worst_rev1000_pct", 0)
    if judged is None and "Misfire rate per 1000 revolutions" in missing:
        missing = [m for m in missing if m != "Misfire rate per 1000 revolutions"]
        parts.append("<p class='muted'>Misfire rate per 1000 revolutions: not judged (the run "
                     "holds no whole 1000-revolution window).</p>")
    if missing:
        parts.append("<p class='muted'>Not drawn (no data in the store): "
                     + html.escape(", ".join(missing)) + "</p>")
    parts.append("<p class='muted'>Made by crankbeat from the store alone.</p></body></html>")
    return "\n".join(parts)
