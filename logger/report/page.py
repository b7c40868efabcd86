"""The HTML of a run page and of the folder's index (self-contained: styles inline, figures as
data URIs). The figures in the tables come from :mod:`logger.report.tables`."""

from __future__ import annotations

import base64
import html
import json
import re
from pathlib import Path

from crankbeat.logger.figures import cylinder_name, cylinder_pairs, wheel_corrected
from crankbeat.logger.report import tables
from crankbeat.logger.report.text import summary_lines
from crankbeat.logger.store import Store

#: The misfire list shows this many rows; the rest are counted below it.
MAX_MISFIRE_ROWS = 300

#: Headline figures the index shows as columns (a run without one shows "-").
INDEX_COLUMNS = ("ride length", "misfires", "worst 200-rev window", "worst 1000-rev window",
                 "alert level", "layout check")

CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 1100px; color: #1d2327;
       padding: 0 1em; }
h1 { font-size: 1.4em; border-bottom: 3px solid #2bb3a3; padding-bottom: .2em; }
h2 { font-size: 1.1em; margin-top: 1.8em; color: #1f6f8b; }
h3 { font-size: .95em; margin: 1em 0 .3em; color: #3b4a54; }
table { border-collapse: collapse; margin: .4em 0; font-size: .88em; }
td, th { border: 1px solid #d4d9dd; padding: .22em .55em; text-align: right; vertical-align: top; }
th { background: #eef3f5; } td.l, th.l { text-align: left; }
tr:nth-child(even) td { background: #fafbfc; }
.off, .alarm .v { color: #c0262d; font-weight: bold; } .muted { color: #6f7a83; font-size: .9em; }
img { max-width: 100%; border: 1px solid #e3e6e8; }
pre { background: #f6f8f9; padding: .6em; font-size: .82em; white-space: pre-wrap; }
.cards { display: flex; flex-wrap: wrap; gap: .5em; margin: 1em 0; }
.card { border: 1px solid #d4d9dd; border-left: 4px solid #2bb3a3; padding: .35em .7em;
        min-width: 9em; background: #fbfdfd; }
.card.alarm { border-left-color: #c0262d; background: #fdf6f6; }
.card .k { font-size: .75em; color: #5b6770; text-transform: uppercase; letter-spacing: .03em; }
.card .v { font-size: 1.05em; margin-top: .1em; }
.settings { display: flex; flex-wrap: wrap; gap: 0 1.5em; align-items: flex-start; }
.scroll { max-height: 28em; overflow-y: auto; display: inline-block; }
nav a { margin-right: 1em; font-size: .9em; }
"""


def _e(v: object, spec: str = ".3f") -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return format(v, spec)
    return html.escape(str(v))


def table(headers: list[str], rows: list[list[object]], *, left: int = 0,
          specs: dict[int, str] | None = None) -> str:
    """An HTML table; the first ``left`` columns align left (words), the rest right (numbers);
    ``specs``: column -> format of its floats; a cell "OFF" is marked."""
    specs = specs or {}

    def cell(i: int, c: object, tag: str) -> str:
        cls = ["l"] if i < left else []
        if c == "OFF":
            cls.append("off")
        attr = f" class='{' '.join(cls)}'" if cls else ""
        return f"<{tag}{attr}>{_e(c, specs.get(i, '.3f')) if tag == 'td' else html.escape(c)}" \
               f"</{tag}>"

    head = "".join(cell(i, h, "th") for i, h in enumerate(headers))
    body = "".join("<tr>" + "".join(cell(i, c, "td") for i, c in enumerate(r)) + "</tr>"
                   for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def _cards(head: list[tables.Headline]) -> str:
    return "<div class='cards'>" + "".join(
        f"<div class='card{' alarm' if h.alarm else ''}'><div class='k'>{html.escape(h.name)}"
        f"</div><div class='v'>{html.escape(h.value)}</div></div>" for h in head) + "</div>"


def _misfires(store: Store, run_id: int, ev, pairs: dict[int, str]) -> list[str]:
    rows = tables.misfire_rows(store, run_id, ev)
    if not rows:
        return ["<h2 id='misfires'>Misfire events</h2><p>No misfire in this run.</p>"]
    counts: dict[str, int] = {}
    for r in rows:
        counts[r["pattern"]] = counts.get(r["pattern"], 0) + 1
    shown = rows[:MAX_MISFIRE_ROWS]
    parts = [
        "<h2 id='misfires'>Misfire events</h2>",
        f"<p>{len(rows)} misfires: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items()))
        + f". <span class='muted'>{tables.PATTERN_LEGEND}.</span></p>",
        "<div class='scroll'>" + table(
            ["time s", "cylinder", "rpm", "gear", "throttle %", "metric", "threshold",
             "pattern"],
            [[r["t_s"], cylinder_name(r["cylinder"], pairs), r["rpm"],
              None if r["gear"] is None else f"{r['gear']:.0f}", r["throttle"], r["metric"],
              r["threshold"], r["pattern"]] for r in shown],
            specs={0: ".2f", 2: ".0f", 4: ".1f", 5: ".2f", 6: ".2f"}) + "</div>",
    ]
    if len(rows) > len(shown):
        parts.append(f"<p class='muted'>{len(rows) - len(shown)} more not listed "
                     "(crankbeat events lists them all).</p>")
    return parts


def _vibration(store: Store, run_id: int) -> list[str]:
    rows = tables.vibration_rows(store, run_id)
    if not rows:
        return ["<h2 id='vibration'>Vibration</h2><p>No accelerometer data in this run.</p>"]
    return ["<h2 id='vibration'>Vibration</h2>", table(
        ["location", "axis", "weighting", "r.m.s. m/s²", "samples", "loudest band",
         "r.m.s. there m/s²"],
        [[r["sensor"], r["axis"], r["weighting"], r["rms"], r["n"], r["loudest_band"],
          r["loudest_rms"]] for r in rows], left=3, specs={3: ".2f", 6: ".2f"}),
        "<p class='muted'>Whole-run r.m.s. acceleration; 'sum' is the vector sum of the three "
        "axes, the value the standards judge.</p>"]


def _settings_and_notes(store: Store, run_id: int) -> list[str]:
    parts = ["<h2 id='settings'>Settings (the rig file this run was analysed with)</h2>",
             "<div class='settings'>"]
    for name, rows in tables.settings_tables(store.rig_toml(run_id)):
        parts.append(f"<div><h3>{html.escape(name)}</h3>"
                     + table(["setting", "value"], [list(r) for r in rows], left=2) + "</div>")
    parts.append("</div>")
    notes = tables.note_rows(store, run_id)
    parts.append("<h2 id='notes'>Notes</h2>")
    parts.append(table(["from", "note (times in s into the ride)"], [list(n) for n in notes],
                       left=2) if notes else "<p>None.</p>")
    return parts


def run_page(store: Store, run_id: int, ev, figures: list[tuple[str, Path]],
             missing: list[str]) -> str:
    """The whole HTML page of one run."""
    info = store.run(run_id)
    pairs = cylinder_pairs(store, run_id)
    head = tables.headline(store, run_id)
    title = f"crankbeat run {run_id}: {info['label'] or info['started_at']}"
    digest = {"run": run_id, "label": info["label"], "rig": info["rig"],
              "started_at": info["started_at"], "status": info["status"],
              "headline": {h.name: [h.value, h.alarm] for h in head}}
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title><style>{CSS}</style>",
        "<script type='application/json' id='crankbeat-headline'>"
        f"{html.escape(json.dumps(digest), quote=False)}</script></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        "<nav><a href='index.html'>all runs</a><a href='#misfires'>misfires</a>"
        "<a href='#vibration'>vibration</a><a href='#figures'>figures</a>"
        "<a href='#settings'>settings</a><a href='#notes'>notes</a></nav>",
        table(["rig", "started (UTC)", "status", "odometer km", "analysed by"],
              [[info["rig"], info["started_at"], info["status"], info["odometer_km"],
                info.get("analyser")]], left=5, specs={3: ".0f"}),
        _cards(head),
        "<h2>Per cylinder</h2>",
        table(["cylinder", "events", "fired", "partial", "misfires", "rate %", "masked",
               "unusable", "fuel cut", "contribution", "interval error deg"],
              [[cylinder_name(c["cylinder"], pairs), c["events"], c["fired"], c["partial"],
                c["misfires"], c["rate_pct"], c["masked"], c["unusable"], c["fuel_cut"],
                c["contribution"], c["interval_error_deg"]] for c in store.cylinder_stats(run_id)],
              specs={5: ".2f", 9: ".3f", 10: ".2f"}),
        "<p class='muted'>rate = misfires / (fired + partial + misfires): masked, unusable and "
        "fuel-cut events are not judged and count nowhere.</p>",
    ]
    if pairs:
        parts.append("<p class='muted'>720° phase unknown (no cam, even firing): '2/3' is "
                     "cylinder 2, or 3 if the phase is the other way round.</p>")
    parts += _misfires(store, run_id, ev, pairs)
    corrected = wheel_corrected(info.get("summary"))
    if not corrected:
        parts.append("<p class='off'>Interval figures UNCORRECTED: this run's wheel tooth "
                     "spacing errors were never learnt; they include them.</p>")
    intervals = store.intervals(run_id)
    if intervals:
        parts += ["<h2>Firing intervals</h2>", table(
            ["from", "to", "expected deg", "observed deg", "± deg", "cycles", "check"],
            [[i["from_cyl"], i["to_cyl"], i["expected_deg"], i["observed_deg"],
              i["stderr_deg"], i["n"],
              ("OFF" if i["flagged"] else "ok") if corrected else "not judged"]
             for i in intervals], specs={2: ".1f", 3: ".2f", 4: ".2f"})]
    parts += _vibration(store, run_id)
    parts.append("<h2 id='figures'>Figures</h2>")
    for fig_title, path in figures:
        data = base64.b64encode(path.read_bytes()).decode("ascii")
        parts.append(f"<h3>{html.escape(fig_title)}</h3>"
                     f"<img alt='{html.escape(fig_title)}' src='data:image/png;base64,{data}'>")
    if missing:
        parts.append("<p class='muted'>Not drawn (no data in the store): "
                     + html.escape(", ".join(missing)) + "</p>")
    parts += _settings_and_notes(store, run_id)
    parts += ["<h2>Sources</h2>", table(
        ["kind", "path", "bytes", "sha256"],
        [[s["kind"], s["path"], s["bytes"], s["sha256"][:16] + "…"] for s in info["sources"]],
        left=2)]
    lines = summary_lines(info.get("summary"), started_at=info.get("started_at"))
    if lines:
        parts += ["<h2>Summary</h2><details><summary>the run summary as text (the same lines "
                  "as crankbeat show)</summary>",
                  f"<pre>{html.escape(chr(10).join(lines))}</pre></details>"]
    parts.append("<p class='muted'>Made by crankbeat from the store alone.</p></body></html>")
    return "\n".join(parts)


_DIGEST = re.compile(r"<script type='application/json' id='crankbeat-headline'>(.*?)</script>",
                     re.S)


def read_digest(page: Path) -> dict | None:
    """The headline figures a run page carries (None for a page without them)."""
    try:
        m = _DIGEST.search(page.read_text(encoding="utf-8"))
        return json.loads(html.unescape(m.group(1))) if m else None
    except (OSError, ValueError):
        return None


def index_page(out: Path) -> str:
    """The index of every run page in ``out``, newest run first, with its headline figures."""
    pages = sorted(out.glob("run*.html"),
                   key=lambda p: -int("".join(filter(str.isdigit, p.stem)) or 0))
    rows = []
    for p in pages:
        d = read_digest(p) or {"run": p.stem, "headline": {}}
        link = f"<a href='{html.escape(p.name)}'>run {html.escape(str(d['run']))}</a>"
        cells = [f"<td class='l'>{link}</td>"] + [
            f"<td class='l'>{_e(d.get(k))}</td>" for k in ("label", "rig", "started_at")]
        for col in INDEX_COLUMNS:
            value, alarm = d["headline"].get(col, ["-", False])
            cells.append(f"<td class='l{' off' if alarm else ''}'>{html.escape(value)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    head = "".join(f"<th class='l'>{html.escape(h)}</th>" for h in
                   ("run", "label", "rig", "started (UTC)", *INDEX_COLUMNS))
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            f"<title>crankbeat runs</title><style>{CSS}</style></head><body>"
            f"<h1>crankbeat runs in this folder</h1><table><tr>{head}</tr>{''.join(rows)}"
            "</table><p class='muted'>Red: above the rig's alert level, or a check that "
            "failed.</p></body></html>")
