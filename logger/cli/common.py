"""Helpers shared by the command modules: the store option, run lookup, output."""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from crankbeat.errors import UsageError
from crankbeat.logger.report.text import fmt  # noqa: F401 (the commands format numbers with it)
from crankbeat.logger.store import Store, jsonable

DEFAULT_STORE = "crankbeat.db"


def add_store_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--store",
        metavar="DB",
        default=None,
        help=f"SQLite store file (default: $CRANKBEAT_STORE or ./{DEFAULT_STORE})",
    )


def store_path(args: argparse.Namespace) -> Path:
    """Flag, then environment, then the working directory's default file."""
    return Path(args.store or os.environ.get("CRANKBEAT_STORE") or DEFAULT_STORE)


def open_store(args: argparse.Namespace, *, create: bool = False) -> Store:
    return Store.open(store_path(args), create=create)


def parse_assignment(text: str, what: str) -> tuple[str, str]:
    """``NAME=VALUE`` -> (NAME, VALUE); a clear usage error otherwise."""
    name, sep, value = text.partition("=")
    if not sep or not name or not value:
        raise UsageError(f"bad {what} '{text}': expected NAME=VALUE")
    return name.strip(), value.strip()


def print_json(obj: Any) -> None:
    print(json.dumps(jsonable(obj), indent=2, allow_nan=False))


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], *, indent: str = "  ") -> str:
    """Plain aligned text columns (numbers right-aligned), for terminals and for grep."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    lines = []
    for k, row in enumerate(cells):
        parts = []
        for i, c in enumerate(row):
            numeric = k > 0 and _looks_numeric(c)
            parts.append(c.rjust(widths[i]) if numeric else c.ljust(widths[i]))
        lines.append(indent + "  ".join(parts).rstrip())
    return "\n".join(lines)


def _looks_numeric(text: str) -> bool:
    try:
        float(text.rstrip("%"))
    except ValueError:
        return text == "-"
    return True


def stderr(message: str) -> None:
    print(message, file=sys.stderr)
