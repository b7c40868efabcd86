"""``crankbeat tag``: key=value tags on a run (bike, build, tyre, fuel ...)."""

from __future__ import annotations

import argparse

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store
from crankbeat.logger.store.labels import parse_tag, remove_tags, set_tags, tags_of

NAME = "tag"
HELP = "set, remove or list key=value tags of a run (trend --tag filters on them)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    add_store_argument(parser)
    parser.add_argument("run", metavar="RUN", help='run id, label, or "last"')
    parser.add_argument("tags", metavar="KEY=VALUE", nargs="*", help="tags to set")
    parser.add_argument("--remove", metavar="KEY", action="append", default=[],
                        help="remove the tag KEY (may be given more than once)")
    parser.epilog = ("example: crankbeat tag last bike=larch-2 tyre=new fuel=98\n"
                     "without tags it lists the run's tags")


def run(args: argparse.Namespace) -> int:
    tags = dict(parse_tag(t) for t in args.tags)
    if set(tags) & set(args.remove):
        raise UsageError("a tag cannot be set and removed at once: "
                         + ", ".join(sorted(set(tags) & set(args.remove))))
    with open_store(args) as store:
        run_id = store.resolve_run(args.run)
        if tags:
            set_tags(store, run_id, tags)
        if args.remove:
            remove_tags(store, run_id, args.remove)
        now = tags_of(store, run_id)
    print(f"run {run_id}: " + (" ".join(f"{k}={v}" for k, v in now.items()) or "no tags"))
    return 0
