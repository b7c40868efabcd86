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
        out.append("vibration (r.m.s., m/s²)")
        out.append(table(
            ["sensor", "rpm", "axis", "weighting", "rms", "samples"],
            [[v["sensor"], f"{fmt(v['rpm_lo'], '.0f')}-{fmt(v['rpm_hi'], '.0f')}", v["axis"],
              v["weighting"], fmt(v["rms"], ".3f"), v["n"]] for v in summed],
        ))

    summary = info.get("summary") or {}
    rest = {k: v for k, v in summary.items() if k not in _FROM_TABLES}
    if rest:
        out.append("")
        out.append("summary")
        out.extend(_nested(rest, "  "))
    return "\n".join(out)


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
