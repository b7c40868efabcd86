"""``crankbeat events``: every firing event of a run, to stdout or a file (format by suffix)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from crankbeat.dsp.events import VERDICT_NAMES
from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store
from crankbeat.logger.export.table import EVENT_COLUMNS as COLUMNS
from crankbeat.logger.figures import run_engine

NAME = "events"
HELP = ("write every firing event of a run (CSV, JSON, JSON lines, Parquet, MDF4), masked and "
        "unusable ones included")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("--format", choices=("csv", "json"), default="csv",
                        help="output format (default csv)")
    parser.add_argument("--cylinder", type=int, metavar="N", help="only cylinder N (from 1)")
    parser.add_argument("--verdict", metavar="V",
                        help="only one verdict: " + ", ".join(VERDICT_NAMES.values()))
    parser.add_argument("--out", metavar="FILE",
                        help="write to FILE instead of stdout, its format by suffix: .csv, "
                             ".json, .jsonl, .parquet, .mf4 (an MDF4 file holds the run's time "
                             "channels too; .parquet and .mf4 need crankbeat[export])")
    parser.epilog = ("example: crankbeat events last --cylinder 2 --verdict misfire > mis.csv\n"
                     "columns: " + ", ".join(COLUMNS) + "\n"
                     "t is the cylinder's firing TDC in s on the CAN log's time base")


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.export import channels_table, events_table, open_writer, run_meta

    if args.cylinder is not None and args.cylinder < 1:
        raise UsageError(f"--cylinder counts from 1, got {args.cylinder}")
    suffix = Path(args.out).suffix.lower() if args.out else f".{args.format}"
    if args.out and not suffix:
        suffix = f".{args.format}"
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if args.cylinder is not None:
            n_cyl = run_engine(store, run_id).n_cylinders
            if args.cylinder > n_cyl:
                raise UsageError(f"--cylinder {args.cylinder}: run {run_id} is of a "
                                 f"{n_cyl}-cylinder engine (cylinders 1..{n_cyl})")
        ev = store.events(run_id, cylinder=args.cylinder, verdict=args.verdict)
        meta = run_meta(store, run_id)
        # a container format takes the run's time channels beside the events
        channels = store.channels(run_id) if suffix in (".mf4", ".mdf") else {}
    target = args.out if args.out else sys.stdout
    with open_writer(target, suffix=suffix) as writer:
        writer.write(events_table(ev, meta=meta))
        if channels:
            writer.write(channels_table(channels, meta=meta))
    return 0
