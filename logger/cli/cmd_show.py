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
    parser.epilog = "example: crankbeat show last --store programme.db"


def run(args: argparse.Namespace) -> int:
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if args.json:
            print_json(run_digest(store, run_id))
        else:
            if args.riding_hours is not None and not args.riding_hours > 0:
                raise UsageError(f"--riding-hours must be above 0, got {args.riding_hours}")
            print(render_run(store, run_id, riding_hours=args.riding_hours))
    return 0
