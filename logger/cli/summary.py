"""A run as readable text: what ``show`` and ``replay`` print."""

from __future__ import annotations

from crankbeat.logger.cli.common import fmt, table
from crankbeat.logger.figures import cylinder_name, cylinder_pairs, wheel_corrected
from crankbeat.logger.report.text import summary_lines
from crankbeat.logger.store import Store


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


def render_run(store: Store, run_id: int, *, riding_hours: float | None = None) -> str:
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
    pairs = cylinder_pairs(store, run_id)
    out.append("per cylinder (rate = misfires / (fired + partial + misfires))")
    if pairs:
        out.append("  720° phase unknown (no cam, even firing): '2/3' = cylinder 2, or 3 if the "
                   "phase is the other way round")
    out.append(table(
        ["cyl", "events", "fired", "partial", "misfires", "rate %", "masked", "unusable",
         "fuel cut", "contrib", "interval err deg"],
        [[cylinder_name(c["cylinder"], pairs), c["events"], c["fired"], c["partial"],
          c["misfires"], fmt(c["rate_pct"], ".2f"),
          c["masked"], c["unusable"], c["fuel_cut"], fmt(c["contribution"], ".3f"),
          fmt(c["interval_error_deg"], "+.2f")] for c in d["cylinders"]],
    ) if d["cylinders"] else "  (no events)")
    if d["cylinders"] and not wheel_corrected(info.get("summary")):
        out.append("  interval err: UNCORRECTED wheel (the tooth spacing errors were never "
                   "learnt; the figures include them)")

    if d["intervals"]:
        out.append("")
        out.append("firing intervals (observed against expected, crank degrees)")
        if not wheel_corrected(info.get("summary")):
            out.append("  UNCORRECTED: this run's wheel tooth spacing errors were never learnt, so "
                       "these figures include them (several degrees); the check is not judged")
        out.append(table(
            ["from", "to", "expected", "observed", "+-", "cycles", "check"],
            [[i["from_cyl"], i["to_cyl"], fmt(i["expected_deg"], ".1f"),
              fmt(i["observed_deg"], ".2f"), fmt(i["stderr_deg"], ".2f"), i["n"],
              ("OFF" if i["flagged"] else "ok") if wheel_corrected(info.get("summary"))
              else "not judged"] for i in d["intervals"]],
        ))

    measured = [v for v in d["vibration"] if v["n"]]  # rows of 0 samples say nothing
    summed = [v for v in measured if v["axis"] == "sum"] or measured
    if summed:
        out.append("")
        out.append("vibration (r.m.s., m/s²; rpm 'all' = the whole run)")
        out.append(table(
            ["sensor", "rpm", "axis", "weighting", "rms", "samples"],
            [[v["sensor"], _band(v), v["axis"], v["weighting"], fmt(v["rms"], ".3f"), v["n"]]
             for v in summed],
        ))

    lines = summary_lines(info.get("summary"), riding_hours=riding_hours,
                          started_at=info.get("started_at"))
    if lines:
        out.append("")
        out.extend(lines)
    return "\n".join(out)


def _band(v: dict) -> str:
    lo, hi = v["rpm_lo"], v["rpm_hi"]
    if lo is None or hi is None:
        return "all"
    return f"{lo:.0f}-{hi:.0f}"
