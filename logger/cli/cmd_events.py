"""``crankbeat events``: every firing event of a run as CSV or JSON."""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys

import numpy as np

from crankbeat.dsp.events import MISFIRE, VERDICT_NAMES
from crankbeat.errors import CrankbeatError, UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store
from crankbeat.logger.figures import run_engine
from crankbeat.logger.store import jsonable

NAME = "events"
HELP = "write every firing event of a run (CSV or JSON), masked and unusable ones included"

#: Output columns; ``misfire`` is 0/1 and ``verdict`` the verdict's name.
COLUMNS = (
    "t", "cycle", "cylinder", "misfire", "verdict", "rpm", "throttle", "metric", "threshold",
    "confidence", "interval_deg", "expected_interval_deg", "contribution",
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("--format", choices=("csv", "json"), default="csv",
                        help="output format (default csv)")
    parser.add_argument("--cylinder", type=int, metavar="N", help="only cylinder N (from 1)")
    parser.add_argument("--verdict", metavar="V",
                        help="only one verdict: " + ", ".join(VERDICT_NAMES.values()))
    parser.add_argument("--out", metavar="FILE", help="write to FILE instead of stdout")
    parser.epilog = ("example: crankbeat events last --cylinder 2 --verdict misfire > mis.csv\n"
                     "columns: " + ", ".join(COLUMNS) + "\n"
                     "t is the cylinder's firing TDC in s on the CAN log's time base")


def _rows(ev: np.ndarray):
    names = [VERDICT_NAMES.get(int(v), str(int(v))) for v in ev["verdict"]]
    cols = {c: ev[c].tolist() for c in ev.dtype.names}
    for i in range(len(ev)):
        yield {
            "t": cols["t"][i], "cycle": cols["cycle"][i], "cylinder": cols["cylinder"][i],
            "misfire": int(ev["verdict"][i] == MISFIRE), "verdict": names[i],
            **{c: cols[c][i] for c in COLUMNS[5:]},
        }


def _csv_value(v: object, col: str) -> object:
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return f"{v:.6f}" if col == "t" else f"{v:.6g}"
    return v


def run(args: argparse.Namespace) -> int:
    if args.cylinder is not None and args.cylinder < 1:
        raise UsageError(f"--cylinder counts from 1, got {args.cylinder}")
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if args.cylinder is not None:
            n_cyl = run_engine(store, run_id).n_cylinders
            if args.cylinder > n_cyl:
                raise UsageError(f"--cylinder {args.cylinder}: run {run_id} is of a "
                                 f"{n_cyl}-cylinder engine (cylinders 1..{n_cyl})")
        ev = store.events(run_id, cylinder=args.cylinder, verdict=args.verdict)
    try:
        out = open(args.out, "w", newline="", encoding="utf-8") if args.out else sys.stdout
    except OSError as exc:
        raise CrankbeatError(f"cannot write '{args.out}': {exc.strerror}") from None
    try:
        if args.format == "json":
            json.dump(jsonable(list(_rows(ev))), out, allow_nan=False)
            out.write("\n")
        else:
            w = csv.writer(out, lineterminator="\n")
            w.writerow(COLUMNS)
            for row in _rows(ev):
                w.writerow([_csv_value(row[c], c) for c in COLUMNS])
    finally:
        if out is not sys.stdout:
            out.close()
    return 0
