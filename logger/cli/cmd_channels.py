"""``crankbeat channels``: a run's ECU status channels (rpm, throttle, gear, ...) at 10 Hz."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store

NAME = "channels"
HELP = "write a run's status channels (rpm, throttle, gear, coolant, road speed) at 10 Hz"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("--format", choices=("csv", "json", "jsonl"), default="csv",
                        help="output format on stdout (default csv)")
    parser.add_argument("--only", action="append", metavar="NAME",
                        help="only this channel (repeat for several)")
    parser.add_argument("--out", metavar="FILE",
                        help="write to FILE, its format by suffix (.csv, .json, .jsonl, "
                             ".parquet, .mf4)")
    parser.epilog = ("example: crankbeat channels last --only gear --only coolant\n"
                     "one row per 0.1 s of CAN time: the last status sample of that tenth")


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.export import channels_table, open_writer, run_meta

    suffix = (Path(args.out).suffix.lower() or f".{args.format}") if args.out \
        else f".{args.format}"
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        channels = store.channels(run_id, names=args.only)
        meta = run_meta(store, run_id)
    if not channels:
        what = f"channel(s) {', '.join(args.only)}" if args.only else "status channels"
        raise UsageError(f"run {run_id} holds no {what} (runs analysed before channels were "
                         "kept have none: re-analyse them)")
    with open_writer(args.out or sys.stdout, suffix=suffix) as writer:
        writer.write(channels_table(channels, meta=meta))
    return 0
