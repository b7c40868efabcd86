"""``crankbeat report``: figures and an HTML page for one run, from the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from crankbeat.logger.cli.common import add_store_argument, open_store

NAME = "report"
HELP = "write a run's figures (PNG) and one self-contained HTML page"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("--out", metavar="DIR", default=None,
                        help="folder for the files (default: ./report-run<ID>)")
    parser.epilog = "example: crankbeat report last --out reports/"


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.report import make_run_report

    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        out = Path(args.out) if args.out else Path(f"report-run{run_id}")
        rep = make_run_report(store, run_id, out)
    print(f"report: {rep.html}")
    for fig in rep.figures:
        print(f"figure: {fig}")
    return 0
