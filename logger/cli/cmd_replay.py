"""``crankbeat replay``: analyse recorded files into the store."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from crankbeat.errors import DuplicateRunError, SourceError, UsageError
from crankbeat.logger.cli.common import (
    add_store_argument,
    open_store,
    parse_assignment,
    print_json,
    stderr,
)
from crankbeat.logger.cli.summary import render_run, run_digest
from crankbeat.logger.stop_signals import interrupt_on_signals

NAME = "replay"
HELP = "analyse a recorded ride (CAN log + accelerometer captures) into the store"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--rig", required=True, help="rig file (TOML) or preset name, e.g. larch")
    parser.add_argument("--can", required=True, metavar="LOG",
                        help="CAN log in a format python-can reads (.log, .asc, .blf, .csv, .trc)")
    parser.add_argument("--accel", action="append", default=[], metavar="[NAME=]CAPTURE",
                        help="accelerometer capture of sensor NAME (repeat per sensor; the name "
                             "may be left out when the rig has one sensor)")
    add_store_argument(parser)
    parser.add_argument("--label", help="a short name for the run (e.g. before-cam-change)")
    parser.add_argument("--notes", help="rider notes")
    parser.add_argument("--odometer", type=float, metavar="KM", help="odometer reading, km")
    parser.add_argument("--pace", nargs="?", type=float, const=1.0, default=None,
                        metavar="FACTOR",
                        help="feed the files at FACTOR x real time (default 1), as live")
    parser.add_argument("--force", action="store_true",
                        help="analyse again even if these files were analysed before")
    parser.add_argument("--json", action="store_true", help="print one JSON object (with 'id')")
    parser.epilog = ("example: crankbeat replay --rig larch --can ride.log "
                     "--accel bar_left=ride.bar_left.acraw --label warm-up --odometer 1520")


def accel_map(rig, specs: list[str]) -> dict[str, Path]:
    """``--accel`` values -> {sensor name: capture path}, checked against the rig's sensors."""
    names = [s.name for s in rig.sensors]
    out: dict[str, Path] = {}
    for spec in specs:
        if "=" in spec:
            name, path = parse_assignment(spec, "--accel")
            if name not in names:
                raise UsageError(f"--accel {spec}: rig '{rig.name}' has no sensor '{name}' "
                                 f"(sensors: {', '.join(names) or 'none'})")
        elif len(names) == 1:
            name, path = names[0], spec
        else:
            raise UsageError(f"--accel {spec}: say which sensor, as NAME=CAPTURE "
                             f"(sensors of rig '{rig.name}': {', '.join(names) or 'none'})")
        if name in out:
            raise UsageError(f"--accel: sensor '{name}' given twice")
        out[name] = Path(path)
    return out


def _check_file(path: Path, what: str) -> None:
    if not path.is_file():
        raise SourceError(f"no such {what} '{path}'")


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.rig import load_rig

    if args.pace is not None and not args.pace > 0:
        raise UsageError(f"--pace must be > 0, got {args.pace:g}")
    if args.odometer is not None and args.odometer < 0:
        raise UsageError(f"--odometer must be >= 0 km, got {args.odometer:g}")
    rig = load_rig(args.rig)
    can_path = Path(args.can)
    _check_file(can_path, "CAN log")
    accel = accel_map(rig, args.accel)
    for name, path in accel.items():
        _check_file(path, f"capture for sensor '{name}'")

    with interrupt_on_signals(), open_store(args, create=True) as store:
        run_id = _analyse(args, rig, can_path, accel, store)
        if args.json:
            print_json(run_digest(store, run_id))
        else:
            print(render_run(store, run_id))
    return 0


def _analyse(args, rig, can_path: Path, accel: dict[str, Path], store) -> int:
    """The run's id: a new analysis, or the earlier run of the same files (said on stderr)."""
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from crankbeat.logger import pipeline  # imported here: it pulls in every dsp stage

    console = Console(file=sys.stderr)
    with Progress(TextColumn("replay"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                  TimeRemainingColumn(), console=console, transient=True,
                  disable=not console.is_terminal) as bar:
        task = bar.add_task("replay", total=1.0)
        try:
            result = pipeline.analyse_replay(
                rig, can_path, accel, store, label=args.label, notes=args.notes,
                odometer_km=args.odometer, pace=args.pace, force=args.force,
                progress=lambda fraction: bar.update(task, completed=min(max(fraction, 0.0), 1.0)),
            )
        except DuplicateRunError as exc:
            earlier = getattr(exc, "run_id", None)
            if earlier is None:
                raise
            stderr(f"these files were analysed before as run {earlier} "
                   "(--force analyses them again)")
            return int(earlier)
    return int(result.run_id)
