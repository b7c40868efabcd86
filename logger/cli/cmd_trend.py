"""``crankbeat trend``: one metric across the run history."""

from __future__ import annotations

import argparse
from pathlib import Path

from crankbeat.logger.cli.common import add_store_argument, fmt, open_store, print_json, table
from crankbeat.logger.store import METRICS
from crankbeat.logger.store.labels import parse_tag

NAME = "trend"
HELP = "follow a metric across runs (misfire rate, interval error, bar vibration, contribution)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("metric", metavar="METRIC", choices=sorted(METRICS),
                        help="one of: " + ", ".join(METRICS))
    parser.add_argument("--rig", help="only runs of this rig")
    parser.add_argument("--tag", metavar="KEY=VALUE", action="append", default=[],
                        help="only runs tagged so (see 'crankbeat tag'; may be repeated)")
    parser.add_argument("--cylinder", type=int, metavar="N", help="only cylinder N (from 1)")
    parser.add_argument("--rpm", metavar="LO-HI", help="only this rpm band, e.g. 5000-6000")
    parser.add_argument("--channel", metavar="NAME=V|NAME=LO-HI",
                        help="only events where a status channel has this value or lies in "
                             "[LO, HI), e.g. gear=3 or coolant=80-95 (event metrics)")
    parser.add_argument("--analyser", metavar="VERSION",
                        help="runs of this analyser version (see 'crankbeat runs'); default: "
                             "each ride's newest analysis")
    parser.add_argument("--by", choices=("date", "odometer"), default="date",
                        help="order runs by start date (default) or odometer reading")
    parser.add_argument("--last", type=int, metavar="N", help="only the last N runs")
    parser.add_argument("--json", action="store_true", help="print one JSON array")
    parser.add_argument("--plot", metavar="PNG", help="also draw the trend into this PNG file")
    parser.epilog = ("example: crankbeat trend bar_vibration --rpm 5000-6000 --by odometer "
                     "--plot bar.png\n"
                     + "\n".join(f"  {k}: {v[1]} [{v[0] or 'ratio'}]" for k, v in METRICS.items()))


def run(args: argparse.Namespace) -> int:
    with open_store(args) as store:
        points = store.trend(args.metric, rig=args.rig, cylinder=args.cylinder,
                             rpm_band=args.rpm, by=args.by, last=args.last,
                             tags=dict(parse_tag(t) for t in args.tag),
                             channel=args.channel, analyser=args.analyser)
        from crankbeat.logger.report.trend_data import trend_marks
        from crankbeat.logger.store.trend import parse_rpm_band

        marks = trend_marks(store, points, args.metric,
                            rpm_band=parse_rpm_band(args.rpm) if args.rpm else None)
        if args.plot:
            from crankbeat.logger.report.trend import plot_trend

            plot_trend(points, Path(args.plot), metric=args.metric, by=args.by,
                       rpm_band=args.rpm, marks=marks)
    if args.json:
        print_json([p.__dict__ for p in points])
        return 0
    if not points:
        print(f"no runs with {args.metric} data")
        return 0
    unit = METRICS[args.metric][0]
    tags = "".join(f", tag {t}" for t in args.tag)
    tags += f", events with {args.channel}" if args.channel else ""
    tags += f", analyser {args.analyser}" if args.analyser else ""
    print(f"rig {points[0].rig}{tags}")
    x_head = "km" if args.by == "odometer" else "started"
    print(table(
        ["run", "label", x_head, "series", f"{args.metric}{f' [{unit}]' if unit else ''}",
         "± s.e.", "n", "not on equal terms"],
        [[p.run_id, (p.label or "-") + ("" if p.status == "complete" else f" ({p.status})"),
          fmt(p.odometer_km, ".0f") if args.by == "odometer" else p.started_at,
          p.series, fmt(p.value, ".3f"), fmt(marks.stderr.get((p.run_id, p.series)), ".3f"),
          p.n, ", ".join(marks.flags.get(p.run_id, [])) or "-"] for p in points],
        indent="",
    ))
    if args.plot:
        print(f"plot: {args.plot}")
    return 0
