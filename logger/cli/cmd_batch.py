"""``crankbeat batch``: analyse many rides at once, on this machine's cores or a Dask cluster."""

from __future__ import annotations

import argparse
import sys

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store, print_json, stderr

NAME = "batch"
HELP = ("analyse many rides (folders, globs, or every stored ride again with the current "
        "analyser) on all cores or a Dask cluster")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("rides", nargs="*", metavar="FOLDER|GLOB",
                        help="folders or globs of CAN logs; captures NAME.SENSOR.acraw beside "
                             "a log NAME.log are paired with it")
    parser.add_argument("--stored", action="store_true",
                        help="every ride of the store whose files still exist, with the rig "
                             "text it was analysed with")
    parser.add_argument("--rig", help="rig file or preset of the rides (needed with FOLDER|GLOB; "
                                      "with --stored: only rides of this rig name)")
    add_store_argument(parser)
    parser.add_argument("--workers", type=int, metavar="N",
                        help="local worker processes (default: every core)")
    parser.add_argument("--scheduler", metavar="tcp://HOST:PORT",
                        help="run on the Dask distributed cluster of this scheduler "
                             "(needs crankbeat[fleet] here and on the workers)")
    parser.add_argument("--json", action="store_true", help="print the batch's report as JSON")
    parser.epilog = ("examples:\n  crankbeat batch --rig larch rides/ 'week2/*.log'\n"
                     "  crankbeat batch --stored --scheduler tcp://10.0.0.5:8786\n"
                     "a ride already analysed from the same files, rig and analyser version is "
                     "skipped: a batch started again goes on where it stopped")


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.fleet.batch import run_batch
    from crankbeat.logger.fleet.engine import make_engine
    from crankbeat.logger.fleet.rides import rides_from_paths, rides_from_store
    from crankbeat.logger.rig import load_rig

    if bool(args.rides) == bool(args.stored):
        raise UsageError("give FOLDER|GLOB arguments or --stored (one of them)")
    if args.workers is not None and args.scheduler:
        raise UsageError("--workers is for the local pool; a cluster has its own workers")
    with open_store(args, create=not args.stored) as store:
        if args.stored:
            rig_name = load_rig(args.rig).name if args.rig else None
            rides, gone = rides_from_store(store, rig_name=rig_name)
            for line in gone:
                stderr(f"left out: {line}")
        else:
            if not args.rig:
                raise UsageError("--rig is needed to analyse rides from files")
            rides = rides_from_paths(args.rides, load_rig(args.rig))
        if not rides:
            raise UsageError("no rides to analyse")
        with make_engine(workers=args.workers, scheduler=args.scheduler) as engine:
            stderr(f"batch: {len(rides)} rides on {engine.description}")
            with _Bar(len(rides)) as bar:
                report = run_batch(store, rides, engine, progress=bar.update)
    if args.json:
        print_json({"analyser": report.analyser, "stored": report.stored,
                    "skipped": report.skipped, "failed": report.failed,
                    "cpu_s": round(report.cpu_s, 3)})
    else:
        print(f"analyser {report.analyser}: {len(report.stored)} stored, "
              f"{len(report.skipped)} skipped (done before), {len(report.failed)} failed")
        for name, why in report.failed.items():
            print(f"  failed {name}: {why}")
    return 1 if report.failed and not report.stored and not report.skipped else 0


class _Bar:
    """A progress bar on a terminal; one line per ride otherwise (logs of a night's batch)."""

    def __init__(self, total: int) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeRemainingColumn,
        )

        self.console = Console(file=sys.stderr)
        self.live = self.console.is_terminal
        self.progress = Progress(TextColumn("batch"), BarColumn(), MofNCompleteColumn(),
                                 TimeRemainingColumn(), console=self.console,
                                 disable=not self.live)
        self.task = self.progress.add_task("batch", total=total)

    def __enter__(self) -> _Bar:
        self.progress.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        self.progress.__exit__(*exc)

    def update(self, done: int, total: int, line: str) -> None:
        self.progress.update(self.task, completed=done)
        if self.live:
            if line.startswith("failed"):
                self.progress.console.print(line)
        else:
            print(f"[{done}/{total}] {line}", file=sys.stderr)
