"""Entry point of the ``crankbeat`` command.

Each command lives in ``logger/cli/cmd_<name>.py`` with ``NAME``, ``HELP`` (one line),
``add_arguments(parser)`` (which also sets ``parser.epilog`` to an example) and
``run(args) -> int``. :data:`COMMANDS` lists them explicitly, in the order ``--help`` shows.
Project errors (:class:`dsp.errors.CrankbeatError`) become one ``error: <message>`` line on
stderr and the error's exit code (0 ok, 1 generic, 2 usage, 3 rig, 4 source, 5 store); an
SQLite failure underneath (disk full, a lock held too long) is a store error too; Ctrl-C gives 130.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sqlite3
import sys
import traceback
from pathlib import Path
from types import ModuleType

from crankbeat.errors import CrankbeatError, StoreError

#: Command modules, in help order. ``cmd_synth`` comes from the simulator; main works without it.
COMMANDS: tuple[str, ...] = (
    "crankbeat.logger.cli.cmd_ride",
    "crankbeat.logger.cli.cmd_replay",
    "crankbeat.logger.cli.cmd_runs",
    "crankbeat.logger.cli.cmd_show",
    "crankbeat.logger.cli.cmd_events",
    "crankbeat.logger.cli.cmd_channels",
    "crankbeat.logger.cli.cmd_trend",
    "crankbeat.logger.cli.cmd_compare",
    "crankbeat.logger.cli.cmd_tag",
    "crankbeat.logger.cli.cmd_delete",
    "crankbeat.logger.cli.cmd_report",
    "crankbeat.logger.cli.cmd_batch",
    "crankbeat.logger.cli.cmd_synth",
    "crankbeat.logger.cli.cmd_bringup",
)

#: Modules that may be absent without breaking the other commands.
OPTIONAL = frozenset({"crankbeat.logger.cli.cmd_synth"})


def command_modules() -> list[ModuleType]:
    """The importable command modules of :data:`COMMANDS`."""
    out = []
    for name in COMMANDS:
        try:
            out.append(importlib.import_module(name))
        except ModuleNotFoundError as exc:
            if name in OPTIONAL and exc.name == name:
                continue
            raise
    return out


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="crankbeat",
        description="Ride-test analysis: misfire per cylinder, firing intervals, rider vibration.",
        epilog="example: crankbeat replay --rig larch --can ride.log --accel ride.bar_left.acraw",
    )
    parser.add_argument("--version", action="version", version=f"crankbeat {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    for mod in command_modules():
        p = sub.add_parser(
            mod.NAME,
            help=mod.HELP,
            description=mod.HELP,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("crankbeat")
    except Exception:  # not installed (running from a source tree)
        return "unknown"


#: Exit code of an unexpected failure inside crankbeat (EX_SOFTWARE of sysexits.h).
INTERNAL_ERROR_EXIT = 70


def main(argv: list[str] | None = None) -> int:
    """Run one command; return its exit code (argv without the program name)."""
    try:
        parser = build_parser()
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:  # --help or a usage error: argparse has printed already
            return int(exc.code or 0)
        if not getattr(args, "_run", None):
            parser.print_help(sys.stderr)
            return 2
        return int(args._run(args) or 0)
    except CrankbeatError as exc:
        print(_error_text(exc), file=sys.stderr)
        return exc.exit_code
    except sqlite3.Error as exc:  # disk full, file locked too long, damaged pages ...
        print(f"error: store: {exc}", file=sys.stderr)
        return StoreError.exit_code
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # e.g. `crankbeat events 3 | head`: the reader has gone
        try:
            # Python flushes stdout again at exit; point it at nothing so that stays quiet.
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        return 0
    except Exception as exc:  # a bug of ours: one line for the rider, the trace for developers
        if os.environ.get("CRANKBEAT_DEBUG"):
            raise
        where = traceback.extract_tb(exc.__traceback__)[-1]
        print(f"error: internal error, please report it: {type(exc).__name__}: {exc} "
              f"(at {Path(where.filename).name}:{where.lineno}; set CRANKBEAT_DEBUG=1 for the "
              "full trace)", file=sys.stderr)
        return INTERNAL_ERROR_EXIT


def _error_text(exc: BaseException) -> str:
    """``error: <message>``; a message listing several problems keeps one per indented line."""
    lines = (str(exc).strip() or type(exc).__name__).splitlines()
    return "\n".join([f"error: {lines[0]}"] + [f"  {line}" for line in lines[1:]])


if __name__ == "__main__":
    sys.exit(main())
