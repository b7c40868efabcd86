"""A run as readable text: what ``show`` and ``replay`` print."""

from __future__ import annotations

from typing import Any

from logger.cli.common import fmt, table
from logger.store import Store

# Summary sections rendered from the store's own tables; the rest of the summary is shown as is.
_FROM_TABLES = {"cylinders", "intervals", "vibration"}


def run_digest(store: Store, run_id: int) -> dict:
    """Everything ``show --json`` prints: the run row, per-cylinder stats, intervals, vibration."""
    info = store.run(run_id)
    return {
        "id": run_id,
        "run": info,
        "cylinders": store.cylinder_stats(run_id),
        "intervals": store.intervals(run_id),
        "vibration": store.vibration(run_id),
    }


def render_run(store: Store, run_id: int) -> str:
    d = run_digest(store, run_id)
    info = d["run"]
    out = [
        f"run {run_id}  [{info['status']}]  rig {info['rig']}  started {info['started_at']}",
    ]
    extra = []
    if info.get("label"):
        extra.append(f"label {info['label']}")
    if info.get("odometer_km") is not None:
        extra.append(f"odometer {fmt(info['odometer_km'], '.0f')} km")
    if extra:
        out.append("  " + "   ".join(extra))
    if info.get("notes"):
        out.append(f"  notes: {info['notes']}")
    for src in info["sources"]:
        out.append(f"  source {src['kind']}: {src['path']}")

    out.append("")
    out.append("per cylinder (rate = misfires / (fired + misfires))")
    out.append(table(
        ["cyl", "events", "fired", "misfires", "rate %", "masked", "unusable", "fuel cut",
         "contrib", "interval err deg"],
        [[c["cylinder"], c["events"], c["fired"], c["misfires"], fmt(c["rate_pct"], ".2f"),
          c["masked"], c["unusable"], c["fuel_cut"], fmt(c["contribution"], ".3f"),
          fmt(c["interval_error_deg"], "+.2f")] for c in d["cylinders"]],
    ) if d["cylinders"] else "  (no events)")

    if d["intervals"]:
        out.append("")
        out.append("firing intervals (observed against expected, crank degrees)")
        out.append(table(
            ["from", "to", "expected", "observed", "+-", "n", "check"],
            [[i["from_cyl"], i["to_cyl"], fmt(i["expected_deg"], ".1f"),
              fmt(i["observed_deg"], ".2f"), fmt(i["stderr_deg"], ".2f"), i["n"],
              "OFF" if i["flagged"] else "ok"] for i in d["intervals"]],
        ))

    summed = [v for v in d["vibration"] if v["axis"] == "sum"] or d["vibration"]
    if summed:
        out.append("")
        out.append("vibration (r.m.s., m/s²; rpm 'all' = the whole run)")
        out.append(table(
            ["sensor", "rpm", "axis", "weighting", "rms", "samples"],
            [[v["sensor"], _band(v), v["axis"], v["weighting"], fmt(v["rms"], ".3f"), v["n"]]
             for v in summed],
        ))

    summary = dict(info.get("summary") or {})
    lines = _known_sections(summary)
    rest = {k: v for k, v in summary.items() if k not in _FROM_TABLES}
    if lines or rest:
        out.append("")
        out.extend(lines)
    if rest:
        out.extend(_nested(rest, "  "))
    return "\n".join(out)


def _band(v: dict) -> str:
    lo, hi = v["rpm_lo"], v["rpm_hi"]
    if lo is None or hi is None:
        return "all"
    return f"{lo:.0f}-{hi:.0f}"


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
            line += f"; alert level {fmt(limit, 'g')} %: " + ("PASSED" if alert else "not reached")
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
