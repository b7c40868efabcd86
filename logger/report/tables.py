"""The rows behind the run page's tables, from the store alone (no HTML here, so tests can check
the figures themselves): headline figures, the misfire list, the vibration table, the run's
settings and its notes.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.analysis import misfire_patterns
from crankbeat.dsp.events import MISFIRE
from crankbeat.logger.figures import ride_start, wheel_corrected
from crankbeat.logger.report.text import layout_words, ride_time
from crankbeat.logger.store import Store
from crankbeat.logger.store.channel_filter import channel_at

#: The legend of the misfire list's pattern column: the classes of
#: :func:`dsp.analysis.misfire_patterns` under the same names ``show`` prints (a second vocabulary
#: here had the report call a burst a "dead spell", the detector's word for something else).
PATTERN_LEGEND = ("isolated = no other misfire within 4 cycles; consecutive = the same cylinder "
                  "also misfired the cycle before or after; alternating = every other cycle, or "
                  "cylinders taking turns; random = other misfires close by, no pattern")

#: What a vibration row's weighting means, with the standard behind it.
WEIGHTING_WORDS = {"Wh": "Wh, hand-arm (ISO 5349-1)", "Wk": "Wk, whole-body vertical (ISO 2631-1)",
                   "Wd": "Wd, whole-body horizontal (ISO 2631-1)",
                   "none": "unweighted (no rider weighting at this location)"}


@dataclass(frozen=True)
class Headline:
    """One headline figure: its name, the value as shown, and whether it calls for attention."""

    name: str
    value: str
    alarm: bool = False


def _num(v: object, spec: str) -> str:
    if isinstance(v, int | float) and math.isfinite(v):
        return format(v, spec)
    return "-"


def headline(store: Store, run_id: int) -> list[Headline]:
    """The figures an engineer looks at first, in the order shown on the page and the index."""
    info = store.run(run_id)
    summary = info.get("summary") or {}
    mis = summary.get("misfire") or {}
    out = []
    t0, t1 = summary.get("t_start"), summary.get("t_end")
    if isinstance(t0, int | float) and isinstance(t1, int | float):
        out.append(Headline("ride length", f"{t1 - t0:.1f} s"))
    out.append(Headline("misfires", f"{mis.get('total', '-')} "
                        f"({_num(mis.get('total_rate_pct'), '.2f')} %)"))
    limit = mis.get("alert_limit_pct")
    for n in (200, 1000):
        worst = mis.get(f"worst_rev{n}_pct")
        over = isinstance(worst, int | float) and isinstance(limit, int | float) and worst > limit
        out.append(Headline(f"worst {n}-rev window",
                            "not judged" if worst is None else f"{_num(worst, '.2f')} %", over))
    if isinstance(limit, int | float):
        out.append(Headline("alert level", f"{limit:g} % " +
                            ("EXCEEDED" if mis.get("alert") else "not reached"),
                            bool(mis.get("alert"))))
    rpm = summary.get("rpm") or {}
    if rpm:
        out.append(Headline("engine speed", f"{_num(rpm.get('min'), '.0f')} to "
                            f"{_num(rpm.get('max'), '.0f')} rpm"))
    for r in store.vibration(run_id):
        if r["rpm_lo"] is None and r["axis"] == "sum" and r["weighting"] != "none":
            out.append(Headline(f"{r['sensor']} vibration",
                                f"{_num(r['rms'], '.2f')} m/s² ({r['weighting']})"))
    lay = summary.get("layout_check") or {}
    if "matches_rig" in lay:
        out.append(Headline("layout check", layout_words(lay["matches_rig"]),
                            lay["matches_rig"] is not True))
    if not wheel_corrected(summary):
        out.append(Headline("firing intervals", "not judged (wheel uncorrected)", True))
    return out


def misfire_rows(store: Store, run_id: int, ev: np.ndarray | None = None) -> list[dict]:
    """One row per misfire in time order: ``t_s`` (s into the ride), ``cylinder``, ``rpm``,
    ``gear`` and ``throttle`` (the stored channel at that time; None without one), ``metric``,
    ``threshold`` and ``pattern`` (see :data:`PATTERN_LEGEND`)."""
    ev = store.events(run_id) if ev is None else ev
    if not len(ev) or not np.any(ev["verdict"] == MISFIRE):
        return []
    pats = misfire_patterns(ev)
    t0 = ride_start(store, run_id, ev)
    at = ev["t"][pats["index"]]
    channels = store.channels(run_id, names=("gear", "throttle"))
    looked_up = {name: channel_at(*channels[name], at) for name in channels}
    rows = []
    for k, i in enumerate(pats["index"]):
        e = ev[i]
        row = {"t_s": float(e["t"] - t0), "cylinder": int(e["cylinder"]),
               "rpm": float(e["rpm"]), "metric": float(e["metric"]),
               "threshold": float(e["threshold"]),
               "pattern": pats["labels"][k]}
        for name in ("gear", "throttle"):
            v = looked_up[name][k] if name in looked_up else np.nan
            if name == "throttle" and not np.isfinite(v):
                v = e["throttle"]
            row[name] = float(v) if np.isfinite(v) else None
        rows.append(row)
    return sorted(rows, key=lambda r: r["t_s"])


def vibration_rows(store: Store, run_id: int) -> list[dict]:
    """Whole-run vibration per location and axis: ``sensor``, ``axis``, ``weighting`` (in words),
    ``rms`` (m/s²), ``n`` samples, and the loudest rpm band of that series."""
    rows = store.vibration(run_id)
    out = []
    for r in rows:
        if r["rpm_lo"] is not None:
            continue
        bands = [b for b in rows if b["rpm_lo"] is not None and b["rms"] is not None
                 and (b["sensor"], b["axis"], b["weighting"]) ==
                 (r["sensor"], r["axis"], r["weighting"])]
        top = max(bands, key=lambda b: b["rms"], default=None)
        out.append({"sensor": r["sensor"], "axis": r["axis"],
                    "weighting": WEIGHTING_WORDS.get(r["weighting"], r["weighting"]),
                    "rms": r["rms"], "n": r["n"],
                    "loudest_band": None if top is None else
                    f"{top['rpm_lo']:.0f}-{top['rpm_hi']:.0f} rpm",
                    "loudest_rms": None if top is None else top["rms"]})
    # the vector sum first: it is the figure the standards judge
    return sorted(out, key=lambda r: (r["sensor"], r["axis"] != "sum", r["axis"]))


def settings_tables(rig_toml: str) -> list[tuple[str, list[tuple[str, str]]]]:
    """The rig file the run was analysed with, one (section, [(key, value)]) per table; lists
    of tables (CAN messages, sensors) become one row per entry naming it."""
    try:
        doc = tomllib.loads(rig_toml)
    except tomllib.TOMLDecodeError as exc:
        return [("rig file", [("unreadable", str(exc))])]
    out: list[tuple[str, list[tuple[str, str]]]] = []
    _walk(doc, "", out)
    return [(name, rows) for name, rows in out if rows]


def _walk(table: dict, name: str, out: list) -> None:
    rows: list[tuple[str, str]] = []
    out.append((name or "file", rows))
    for key, value in table.items():
        path = f"{name}.{key}" if name else key
        if isinstance(value, dict):
            _walk(value, path, out)
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            out.append((path, [(str(v.get("name", i + 1)), _brief(v))
                               for i, v in enumerate(value)]))
        else:
            rows.append((key, _value(value)))


def _brief(entry: dict) -> str:
    """A list entry in one line: its scalar keys, and how many of each nested list."""
    parts = []
    for k, v in entry.items():
        if k == "name":
            continue
        if isinstance(v, list) and v and isinstance(v[0], dict):
            parts.append(f"{len(v)} {k}s: " + ", ".join(str(x.get("name", "?")) for x in v))
        elif k == "id" and isinstance(v, int) and not isinstance(v, bool):
            parts.append(f"id 0x{v:X}")  # CAN ids are read in hex
        elif not isinstance(v, dict):
            parts.append(f"{k} {_value(v)}")
    return "; ".join(parts)


def _value(v: object) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, list):
        return ", ".join(_value(x) for x in v)
    return str(v)


def note_rows(store: Store, run_id: int) -> list[tuple[str, str]]:
    """(source, note): the engineer's own notes, then what the analysis noted (wall-clock times
    restated as s into the ride)."""
    info = store.run(run_id)
    out = []
    if info.get("notes"):
        out.append(("engineer", str(info["notes"])))
    summary = info.get("summary") or {}
    start = summary.get("t_start")
    start = float(start) if isinstance(start, int | float) else None
    for note in summary.get("notes") or []:
        out.append(("analysis", ride_time(str(note), start)))
    return out
