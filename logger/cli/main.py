"""Entry point of the ``crankbeat`` command (filled in by the CLI module)."""

import sys


def main(argv: list[str] | None = None) -> int:
    print("crankbeat: commands are being built", file=sys.stderr)
    return 1
