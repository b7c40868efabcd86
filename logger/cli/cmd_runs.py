"""``crankbeat runs``: the runs in the store."""

from __future__ import annotations

import argparse

from crankbeat.logger.cli.common import add_store_argument, fmt, open_store, print_json, table

NAME = "runs"
HELP = "list the runs in the store"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("--rig", help="only runs of this rig (by name)")
    parser.add_argument("--json", action="store_true", help="print one JSON array")
    parser.epilog = "example: crankbeat runs --rig larch --store programme.db"


def run(args: argparse.Namespace) -> int:
    with open_store(args) as store:
        runs = store.runs(rig=args.rig)
    if args.json:
        for r in runs:
            r.pop("summary", None)
        print_json(runs)
        return 0
    if not runs:
        print("no runs" + (f" of rig '{args.rig}'" if args.rig else ""))
        return 0
    print(table(
        ["id", "rig", "started", "label", "km", "status", "events", "misfires", "analyser"],
        [[r["id"], r["rig"], r["started_at"], r["label"] or "-", fmt(r["odometer_km"], ".0f"),
          r["status"], r["n_events"], r["n_misfires"], r["analyser"] or "-"] for r in runs],
        indent="",
    ))
    return 0
