"""``crankbeat show``: one run's summary."""

from __future__ import annotations

import argparse

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store, print_json
from crankbeat.logger.cli.summary import render_run, run_digest

NAME = "show"
HELP = "show one run: per-cylinder misfires, firing intervals, vibration, stream health"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("--riding-hours", type=float, metavar="H",
                        help="daily riding time for the exposure A(8) (default: the rig's)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--plot", metavar="PNG",
                        help="also draw the run's channels and per-event metric on one time "
                             "axis into this PNG (with --at or --event: a zoom on that event)")
    parser.add_argument("--at", type=float, metavar="S",
                        help="zoom on the event nearest S seconds into the ride (needs --plot)")
    parser.add_argument("--event", type=int, metavar="N",
                        help="zoom on event N: row N of 'crankbeat events' from 1 (needs --plot)")
    parser.add_argument("--cylinder", type=int, metavar="C",
                        help="with --at: the nearest event of cylinder C")
    parser.epilog = ("example: crankbeat show last --store programme.db\n"
                     "         crankbeat show last --plot ride.png\n"
                     "         crankbeat show last --at 35.4 --cylinder 2 --plot zoom.png")


def run(args: argparse.Namespace) -> int:
    if (args.at is not None or args.event is not None) and not args.plot:
        raise UsageError("--at and --event draw a zoom: give --plot FILE.png too")
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if args.plot:
            print(f"plot: {_plot(store, run_id, args)}")
        if args.json:
            print_json(run_digest(store, run_id))
        else:
            if args.riding_hours is not None and not args.riding_hours > 0:
                raise UsageError(f"--riding-hours must be above 0, got {args.riding_hours}")
            print(render_run(store, run_id, riding_hours=args.riding_hours))
    return 0


def _plot(store, run_id: int, args: argparse.Namespace):
    """The channel view, or the zoom on the event ``--at`` / ``--event`` names."""
    from pathlib import Path

    from crankbeat.logger.figures import event_at, ride_start
    from crankbeat.logger.report.channel_plots import plot_channels, plot_event_zoom

    path = Path(args.plot)
    if args.at is None and args.event is None:
        if plot_channels(store, run_id, path) is None:
            raise UsageError(f"run {run_id} has no channels or events to draw")
        return path
    ev = store.events(run_id)
    if args.event is not None:
        if not 1 <= args.event <= len(ev):
            raise UsageError(f"--event must be 1..{len(ev)} for run {run_id}, got {args.event}")
        index = args.event - 1
    else:
        try:
            index = event_at(ev, args.at, ride_start(store, run_id, ev), cylinder=args.cylinder)
        except ValueError:
            raise UsageError(f"run {run_id} has no timed event"
                             + (f" of cylinder {args.cylinder}" if args.cylinder else "")) from None
    return plot_event_zoom(store, run_id, index, path)
