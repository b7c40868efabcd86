"""A run's summary JSON as readable lines, shared by ``crankbeat show`` and the HTML report."""

from __future__ import annotations

import math
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


def summary_lines(summary: dict | None) -> list[str]:
    """The pipeline's known sections in a line or two each, then anything else as key: value."""
    rest = {k: v for k, v in dict(summary or {}).items() if k not in FROM_TABLES}
    lines = _known_sections(rest)
    return lines + _nested(rest, "  ")


def _known_sections(summary: dict) -> list[str]:
    """One or two lines for the sections the pipeline writes; removes them from ``summary``."""
    out = []
    mis = summary.pop("misfire", None)
    if isinstance(mis, dict):
        mis.pop("per_cylinder", None)  # shown in the table above
        alert = mis.pop("alert", None)
        limit = mis.pop("alert_limit_pct", None)
        total, pct = mis.pop("total", "-"), mis.pop("total_rate_pct", None)
        line = (f"misfire: {total} in all ({fmt(pct)} %)"
                f", worst 200-rev window {fmt(mis.pop('worst_rev200_pct', None))} %"
                f", worst 1000-rev window {fmt(mis.pop('worst_rev1000_pct', None))} %")
        if limit is not None:
            verdict = "EXCEEDED, stop and check the engine" if alert else "not reached"
            line += f"; alert level {fmt(limit, 'g')} %: {verdict}"
        out.append(line)
        patterns = mis.pop("patterns", None)
        if isinstance(patterns, dict) and patterns:
            out.append("  patterns: " + ", ".join(f"{k} {v}" for k, v in patterns.items()))
        if mis:
            out.extend(_nested({"misfire (more)": mis}, "  "))
    lay = summary.pop("layout_check", None)
    if isinstance(lay, dict):
        scores = lay.get("scores") or {}
        ranked = sorted(scores.items(), key=lambda kv: -(kv[1] or 0))[:3]
        verdict = "matches the rig file" if lay.get("matches_rig") else "DIFFERS from the rig file"
        out.append(f"layout check: best fit {lay.get('best')} ({verdict}: "
                   f"{lay.get('rig_layout')}); scores "
                   + ", ".join(f"{k} {fmt(v, '.3f')}" for k, v in ranked))
    rpm = summary.pop("rpm", None)
    if isinstance(rpm, dict):
        out.append("rpm: " + ", ".join(f"{k} {fmt(v, '.0f')}" for k, v in rpm.items()))
    t0, t1 = summary.pop("t_start", None), summary.pop("t_end", None)
    if isinstance(t0, int | float) and isinstance(t1, int | float):
        out.append(f"CAN time {t0:.3f} .. {t1:.3f} s ({t1 - t0:.1f} s)")
    rough = summary.pop("rough_road", None)
    if isinstance(rough, dict):
        out.append(f"rough road: {rough.get('spans', 0)} spans, "
                   f"{fmt(rough.get('seconds'), '.1f')} s (events inside are masked)")
    expo = summary.pop("vibration_exposure", None)
    if isinstance(expo, dict) and isinstance(expo.get("a8_m_s2"), dict):
        out.append("daily exposure A(8) for " + fmt(expo.get("riding_hours"), "g")
                   + " h riding: " + ", ".join(f"{k} {fmt(v, '.2f')} m/s²"
                                               for k, v in expo["a8_m_s2"].items()))
    health = summary.pop("stream", None)
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
    if isinstance(notes, list) and notes:
        out.append("notes:")
        out.extend(f"  - {n}" for n in notes)
    return out


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
