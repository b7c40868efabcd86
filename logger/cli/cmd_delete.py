"""``crankbeat delete``: remove a run and everything stored for it."""

from __future__ import annotations

import argparse

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store
from crankbeat.logger.store.labels import delete_run

NAME = "delete"
HELP = "remove a run and its events, windows, intervals and vibration from the store"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help="run id or label (not \"last\": name it)")
    parser.add_argument("--yes", action="store_true", help="really delete (required)")
    parser.epilog = "example: crankbeat delete 7 --yes"


def run(args: argparse.Namespace) -> int:
    if str(args.run).strip() == "last":
        raise UsageError("delete needs the run's id or label, not 'last' (see 'crankbeat runs')")
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if not args.yes:
            raise UsageError(f"deleting run {run_id} cannot be undone: add --yes to do it")
        removed = delete_run(store, run_id)
    print(f"run {run_id} deleted ({removed.get('events', 0)} events)")
    return 0
