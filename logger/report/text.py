"""A run's summary JSON as readable lines, shared by ``crankbeat show`` and the HTML report."""

from __future__ import annotations

import math
import re
from typing import Any

#: Summary sections that the store's own tables show better (left out of the text).
FROM_TABLES = frozenset({"cylinders", "intervals", "vibration"})


def fmt(value: Any, spec: str = ".2f", missing: str = "-") -> str:
    """A number for a text table (``missing`` for None/NaN)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return missing
    if isinstance(value, int | float):
        return format(value, spec)
    return str(value)


def summary_lines(summary: dict | None, *, riding_hours: float | None = None,
                  started_at: str | None = None) -> list[str]:
    """The pipeline's known sections in a line or two each, then anything else as key: value.

    ``riding_hours`` restates the daily exposure A(8) for that riding time (the run stored it
    for the rig's stated time). ``started_at`` (ISO 8601, the run's start) is where times in the
    notes count from when the summary holds no CAN start time.
    """
    rest = {k: v for k, v in dict(summary or {}).items() if k not in FROM_TABLES}
    if not isinstance(rest.get("t_start"), int | float) and started_at:
        rest["_start_fallback"] = _epoch(started_at)
    lines = _known_sections(rest, riding_hours)
    return lines + _nested(rest, "  ")


def _known_sections(summary: dict, riding_hours: float | None = None) -> list[str]:
    """One or two lines for the sections the pipeline writes; removes them from ``summary``."""
    out = []
    mis = summary.pop("misfire", None)
    if isinstance(mis, dict):
        mis.pop("per_cylinder", None)  # shown in the table above
        alert = mis.pop("alert", None)
        limit = mis.pop("alert_limit_pct", None)
        total, pct = mis.pop("total", "-"), mis.pop("total_rate_pct", None)
        w200, w1000 = mis.pop("worst_rev200_pct", None), mis.pop("worst_rev1000_pct", None)
        line = (f"misfire: {total} in all ({fmt(pct)} %)"
                f", worst 200-rev window {_window(w200, 200)}"
                f", worst 1000-rev window {_window(w1000, 1000)}")
        if limit is not None:
            verdict = ("EXCEEDED: stop safely as soon as the road allows and check the engine"
                       if alert else "not reached" if w200 is not None else "not judged")
            line += f"; alert level {fmt(limit, 'g')} %: {verdict}"
        out.append(line)
        patterns = mis.pop("patterns", None)
        if isinstance(patterns, dict) and patterns:
            out.append("  patterns: " + ", ".join(f"{k} {v}" for k, v in patterns.items()))
        if mis:
            out.extend(_nested({"misfire (more)": mis}, "  "))
    lay = summary.pop("layout_check", None)
    if isinstance(lay, dict):
        out.append(_layout_line(lay))
    rpm = summary.pop("rpm", None)
    if isinstance(rpm, dict):
        out.append("rpm: " + ", ".join(f"{k} {fmt(v, '.0f')}" for k, v in rpm.items()))
    t0, t1 = summary.pop("t_start", None), summary.pop("t_end", None)
    if isinstance(t0, int | float) and isinstance(t1, int | float):
        out.append(f"CAN time {t0:.3f} .. {t1:.3f} s ({t1 - t0:.1f} s)")
    rough = summary.pop("rough_road", None)
    health = summary.pop("stream", None)
    if not _has_accelerometer(health):
        out.append("vibration and rough-road masking: off (no accelerometer data in this run)")
    elif isinstance(rough, dict):
        out.append(f"rough road: {rough.get('spans', 0)} spans, "
                   f"{fmt(rough.get('seconds'), '.1f')} s (events inside are masked)")
    expo = summary.pop("vibration_exposure", None)
    if isinstance(expo, dict) and isinstance(expo.get("a8_m_s2"), dict) and \
            _has_accelerometer(health):
        out.append(_exposure_line(expo, riding_hours))
    if isinstance(health, dict):
        can = {k[4:]: v for k, v in health.items() if k.startswith("can_")}
        out.append("stream: CAN " + ", ".join(
            f"{k.replace('_', ' ')} {v}" for k, v in can.items()
            if k == "frames" or v))
        per: dict[str, list[str]] = {}
        for key in ("good", "corrupt", "lost", "reconnects"):
            for sensor, v in (health.get(f"serial_{key}") or {}).items():
                if key == "good" or v:
                    per.setdefault(sensor, []).append(f"{key} {v}")
        for sensor, parts in per.items():
            out.append(f"  serial {sensor}: frames " + ", ".join(parts))
    notes = summary.pop("notes", None)
    summary.pop("intervals_from_t", None)
    fallback = summary.pop("_start_fallback", None)
    if isinstance(notes, list) and notes:
        out.append("notes (times in s into the ride):")
        start = t0 if isinstance(t0, int | float) else fallback
        out.extend(f"  - {ride_time(str(n), start)}" for n in notes)
    return out


# a time on a wall-clock base (s since 1970) inside a note: "t=1767225628.4 s"
_EPOCH_TIME = re.compile(r"(?:host )?t ?= ?(\d{9,}(?:\.\d+)?) s")


def _epoch(iso: str) -> float | None:
    from datetime import datetime

    try:
        return datetime.fromisoformat(iso).timestamp()
    except (TypeError, ValueError):
        return None


def ride_time(note: str, t_start: float | None) -> str:
    """A note with wall-clock times restated as time into the ride (``t_start`` = 0)."""
    if t_start is None:
        return note
    # a host clock a few ms ahead of the CAN log's first frame is still the start of the ride
    return _EPOCH_TIME.sub(lambda m: f"{max(float(m.group(1)) - t_start, 0.0):.1f} s", note)


def _exposure_line(expo: dict, riding_hours: float | None) -> str:
    """Daily exposure A(8) per sensor, for the stated riding time (ISO 5349-1: a·sqrt(T/8 h))."""
    stored = expo.get("riding_hours")
    hours = stored
    values = dict(expo["a8_m_s2"])
    if riding_hours is not None and isinstance(stored, int | float) and stored > 0:
        hours = riding_hours
        values = {k: None if v is None else v * math.sqrt(riding_hours / stored)
                  for k, v in values.items()}
    parts = [f"{k} {fmt(v, '.2f')} m/s²" if _finite(v) else f"{k} not weighted (its location "
             "has no rider weighting)" for k, v in values.items()]
    return f"daily exposure A(8) for {fmt(hours, 'g')} h riding: " + ", ".join(parts)


def _finite(v: object) -> bool:
    return isinstance(v, int | float) and math.isfinite(v)


def _window(worst: float | None, revolutions: int) -> str:
    if worst is None:
        return f"not judged (no whole {revolutions}-revolution window)"
    return f"{fmt(worst)} %"


def _has_accelerometer(health: object) -> bool:
    """Whether the run read any accelerometer frame (runs stored without stream health count)."""
    if not isinstance(health, dict):
        return True
    good = health.get("serial_good")
    return bool(isinstance(good, dict) and any(good.values()))


def layout_words(matches_rig: bool | None) -> str:
    """The layout check's verdict in words (None: another layout fits better, not clearly)."""
    if matches_rig is None:
        return "not judged (no layout fits clearly)"
    return "matches the rig file" if matches_rig else "DIFFERS from the rig file"


def _layout_line(lay: dict) -> str:
    """The layout check in words: layouts that fire alike are named as one family."""
    scores = lay.get("scores") or {}
    best = lay.get("best")
    if best is None:
        return (f"layout check: no best fit found (too little steady running to tell); "
                f"rig file says {lay.get('rig_layout')}")
    family = lay.get("same_firing") or [best]
    name = family[0] if len(family) == 1 else " / ".join(family) + ": same firing"
    verdict = layout_words(lay.get("matches_rig"))
    others = sorted(((k, v) for k, v in scores.items() if k not in family),
                    key=lambda kv: -(kv[1] or 0))[:2]
    text = (f"layout check: best fit {name} ({verdict}: {lay.get('rig_layout')}); "
            f"score {fmt(scores.get(best), '.3f')}")
    if others:
        text += ", next " + ", ".join(f"{k} {fmt(v, '.3f')}" for k, v in others)
    return text


def _nested(obj: Any, indent: str) -> list[str]:
    """Any JSON-like summary section as indented ``key: value`` lines."""
    lines = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            if isinstance(v, dict | list) and v and not _flat_list(v):
                lines.append(f"{indent}{k}:")
                lines.extend(_nested(v, indent + "  "))
            else:
                lines.append(f"{indent}{k}: {_scalar(v)}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            if isinstance(v, dict | list) and not _flat_list(v):
                lines.append(f"{indent}[{i}]")
                lines.extend(_nested(v, indent + "  "))
            else:
                lines.append(f"{indent}- {_scalar(v)}")
    else:
        lines.append(f"{indent}{_scalar(obj)}")
    return lines


def _flat_list(v: Any) -> bool:
    return isinstance(v, list) and len(v) <= 12 and all(
        not isinstance(x, dict | list) for x in v
    )


def _scalar(v: Any) -> str:
    if isinstance(v, list):
        return ", ".join(_scalar(x) for x in v) if v else "(none)"
    if isinstance(v, dict):
        return "(none)"
    if isinstance(v, float):
        return fmt(v, ".4g")
    return "-" if v is None else str(v)
