"""``crankbeat compare``: two runs side by side."""

from __future__ import annotations

import argparse

from crankbeat.dsp.layout import layout_signature
from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, fmt, open_store, print_json, table
from crankbeat.logger.figures import cylinder_name, cylinder_pairs, run_engine
from crankbeat.logger.store import Store

NAME = "compare"
HELP = "put two runs side by side: misfire rates, contribution, intervals, vibration"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run_a", metavar="RUN", help='first run (id, label or "last")')
    parser.add_argument("run_b", metavar="RUN", help="second run")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.epilog = "example: crankbeat compare before-cam-change last"


def _diff(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else b - a


def _band_key(key: tuple) -> tuple:
    """Sort key of (sensor, weighting, axis, rpm_lo, rpm_hi); whole-run rows (None) first."""
    return (*key[:3], -1.0 if key[3] is None else key[3], -1.0 if key[4] is None else key[4])


def comparison(store: Store, a: int, b: int) -> dict:
    """Per-cylinder, per-interval and per-band rows holding both runs' values and b − a."""
    ca = {c["cylinder"]: c for c in store.cylinder_stats(a)}
    cb = {c["cylinder"]: c for c in store.cylinder_stats(b)}
    cyl = []
    for k in sorted(set(ca) | set(cb)):
        x, y = ca.get(k, {}), cb.get(k, {})
        row = {"cylinder": k}
        for key in ("rate_pct", "contribution", "interval_error_deg"):
            row[f"{key}_a"], row[f"{key}_b"] = x.get(key), y.get(key)
            row[f"{key}_diff"] = _diff(x.get(key), y.get(key))
        cyl.append(row)
    ia = {(i["from_cyl"], i["to_cyl"]): i for i in store.intervals(a)}
    ib = {(i["from_cyl"], i["to_cyl"]): i for i in store.intervals(b)}
    intervals = []
    for key in sorted(set(ia) | set(ib)):
        x, y = ia.get(key, {}), ib.get(key, {})
        intervals.append({
            "from_cyl": key[0], "to_cyl": key[1],
            "expected_deg": x.get("expected_deg", y.get("expected_deg")),
            "observed_a": x.get("observed_deg"), "observed_b": y.get("observed_deg"),
            "diff": _diff(x.get("observed_deg"), y.get("observed_deg")),
        })
    def _vib(run: int) -> dict:
        rows = store.vibration(run)
        summed = [v for v in rows if v["axis"] == "sum"] or rows
        return {(v["sensor"], v["weighting"], v["axis"], v["rpm_lo"], v["rpm_hi"]): v["rms"]
                for v in summed}
    va, vb = _vib(a), _vib(b)
    vibration = [
        {"sensor": k[0], "weighting": k[1], "axis": k[2], "rpm_lo": k[3], "rpm_hi": k[4],
         "rms_a": va.get(k), "rms_b": vb.get(k), "diff": _diff(va.get(k), vb.get(k))}
        for k in sorted(set(va) | set(vb), key=_band_key)
    ]
    return {"a": store.run(a), "b": store.run(b), "cylinders": cyl, "intervals": intervals,
            "vibration": vibration}


def same_engine(store: Store, a: int, b: int) -> str | None:
    """None when the two runs' engines fire alike; else why their rows do not correspond."""
    ea, eb = run_engine(store, a), run_engine(store, b)
    ra, rb = store.run(a)["rig"], store.run(b)["rig"]
    if ea.n_cylinders != eb.n_cylinders or layout_signature(ea) != layout_signature(eb):
        return (f"run {a} is rig '{ra}' ({ea.name}, {ea.n_cylinders} cylinders) and run {b} is "
                f"rig '{rb}' ({eb.name}, {eb.n_cylinders} cylinders): their cylinders and "
                "firing intervals do not correspond; compare runs of one engine layout")
    return None


def run(args: argparse.Namespace) -> int:
    with open_store(args) as store:
        a, b = store.resolve_run(args.run_a), store.resolve_run(args.run_b)
        why = same_engine(store, a, b)
        if why:
            raise UsageError(why)
        cmp = comparison(store, a, b)
        # a cylinder whose phase is unknown in either run is named with its 360° partner
        pairs = cylinder_pairs(store, a) or cylinder_pairs(store, b)
    if args.json:
        for side in ("a", "b"):
            cmp[side].pop("summary", None)
        print_json(cmp)
        return 0
    ra, rb = cmp["a"], cmp["b"]
    if ra["rig"] != rb["rig"]:
        print(f"note: rigs differ ('{ra['rig']}' and '{rb['rig']}'), same engine layout")
    print(f"A = run {a} ({ra['label'] or ra['started_at']}), B = run {b} "
          f"({rb['label'] or rb['started_at']}); diff = B - A")
    print()
    print("per cylinder")
    print(table(
        ["cyl", "rate% A", "rate% B", "diff", "contrib A", "contrib B", "diff",
         "int.err A", "int.err B", "diff"],
        [[cylinder_name(c["cylinder"], pairs),
          fmt(c["rate_pct_a"]), fmt(c["rate_pct_b"]), fmt(c["rate_pct_diff"], "+.2f"),
          fmt(c["contribution_a"], ".3f"), fmt(c["contribution_b"], ".3f"),
          fmt(c["contribution_diff"], "+.3f"),
          fmt(c["interval_error_deg_a"], "+.2f"), fmt(c["interval_error_deg_b"], "+.2f"),
          fmt(c["interval_error_deg_diff"], "+.2f")] for c in cmp["cylinders"]],
    ))
    if cmp["intervals"]:
        print()
        print("firing intervals (deg)")
        print(table(
            ["from", "to", "expected", "A", "B", "diff"],
            [[i["from_cyl"], i["to_cyl"], fmt(i["expected_deg"], ".1f"), fmt(i["observed_a"]),
              fmt(i["observed_b"]), fmt(i["diff"], "+.2f")] for i in cmp["intervals"]],
        ))
    if cmp["vibration"]:
        print()
        print("vibration r.m.s. (m/s²)")
        print(table(
            ["sensor", "weighting", "axis", "rpm", "A", "B", "diff"],
            [[v["sensor"], v["weighting"], v["axis"],
              "all" if v["rpm_lo"] is None else f"{v['rpm_lo']:.0f}-{fmt(v['rpm_hi'], '.0f')}",
              fmt(v["rms_a"], ".3f"), fmt(v["rms_b"], ".3f"), fmt(v["diff"], "+.3f")]
             for v in cmp["vibration"]],
        ))
    return 0
