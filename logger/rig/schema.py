"""Typed reading of TOML tables with every problem collected as one line.

A :class:`Section` wraps one TOML table and its key path (``can.message[0].signal[2]``). Each
``get`` checks presence and type, records a problem instead of raising, and remembers which keys
were read, so :meth:`Section.finish` can report the keys nobody asked for (typos).
All problems of one file go to one :class:`Problems`, which raises a single :class:`RigError`.
"""

from __future__ import annotations

import difflib
from collections.abc import Callable
from typing import Any, Literal

from crankbeat.errors import RigError

Kind = Literal["int", "float", "str", "bool", "table", "tables", "ints", "floats", "strs"]

_KIND_TEXT = {
    "int": "an integer",
    "float": "a number",
    "str": "a string",
    "bool": "true or false",
    "table": "a table",
    "tables": "an array of tables ([[...]])",
    "ints": "an array of integers",
    "floats": "an array of numbers",
    "strs": "an array of strings",
}

_MISSING = object()


class Problems:
    """Every problem found in one file, each already a one-line message."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.lines: list[str] = []

    def add(self, path: str, what: str, expected: str | None = None) -> None:
        where = f"{path}: " if path else ""
        tail = f", expected {expected}" if expected else ""
        self.lines.append(f"{self.file}: {where}{what}{tail}")

    def __len__(self) -> int:
        return len(self.lines)

    def raise_if_any(self) -> None:
        """Raise one RigError: the problem itself, or a count line followed by one per line."""
        if not self.lines:
            return
        if len(self.lines) == 1:
            err = RigError(self.lines[0])
        else:
            err = RigError("\n".join([f"{self.file}: {len(self.lines)} problems"] + self.lines))
        err.problems = list(self.lines)  # type: ignore[attr-defined]
        raise err


def describe(value: Any) -> str:
    """A value as the user wrote it, with its TOML type when that is the point."""
    kind = {bool: "boolean", int: "integer", float: "number", str: "string", list: "array",
            dict: "table"}.get(type(value), type(value).__name__)
    text = repr(value) if not isinstance(value, (dict, list)) else kind
    return f"{text} ({kind})" if isinstance(value, (bool, str)) else text


def _type_ok(value: Any, kind: Kind) -> bool:
    def num(v: Any) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool)

    def integer(v: Any) -> bool:
        return isinstance(v, int) and not isinstance(v, bool)

    if kind == "int":
        return integer(value)
    if kind == "float":
        return num(value)
    if kind == "str":
        return isinstance(value, str)
    if kind == "bool":
        return isinstance(value, bool)
    if kind == "table":
        return isinstance(value, dict)
    if kind == "tables":
        return isinstance(value, list) and all(isinstance(v, dict) for v in value)
    if kind == "ints":
        return isinstance(value, list) and all(integer(v) for v in value)
    if kind == "floats":
        return isinstance(value, list) and all(num(v) for v in value)
    return isinstance(value, list) and all(isinstance(v, str) for v in value)  # strs


class Section:
    """One TOML table being read, with its key path for messages.

    The ``name`` of an array-of-tables entry is shown after the path so a message says which
    signal or sensor it is about: ``can.message[0].signal[2].length (tooth_period)``; a nameless
    sub-table (a sensor's ``checksum``) borrows its owner's name.
    """

    def __init__(self, data: dict[str, Any], path: str, problems: Problems,
                 parent_name: str | None = None) -> None:
        self.data = data
        self.path = path
        self.problems = problems
        self.seen: set[str] = set()
        own = data.get("name")
        # a nameless sub-table (a checksum) is reported under its owner's name
        self.name = own if isinstance(own, str) and "[" in path else parent_name
        self.label = self._with_name(path)

    def _with_name(self, path: str) -> str:
        return f"{path} ({self.name})" if self.name else path

    def key(self, key: str) -> str:
        """Key path of one key of this table, for messages: ``path.key (name)``."""
        return self._with_name(f"{self.path}.{key}" if self.path else key)

    def problem(self, key: str | None, what: str, expected: str | None = None) -> None:
        self.problems.add(self.label if key is None else self.key(key), what, expected)

    def has(self, key: str) -> bool:
        return key in self.data

    def get(
        self,
        key: str,
        kind: Kind,
        *,
        required: bool = False,
        default: Any = None,
        check: Callable[[Any], bool] | None = None,
        expected: str | None = None,
    ) -> Any:
        """The value of ``key`` converted to ``kind``, or ``default`` after recording a problem.

        ``check`` is a predicate on the (type-correct) value; ``expected`` describes what passes
        it and ends the message.
        """
        self.seen.add(key)
        value = self.data.get(key, _MISSING)
        if value is _MISSING:
            if required:
                self.problem(key, "missing", expected or _KIND_TEXT[kind])
            return default
        if not _type_ok(value, kind):
            self.problem(key, f"got {describe(value)}", _KIND_TEXT[kind])
            return default
        if kind == "float":
            value = float(value)
        elif kind == "floats":
            value = [float(v) for v in value]
        if check is not None and not check(value):
            self.problem(key, f"got {describe(value)}", expected)
            return default
        return value

    def choice(self, key: str, options: tuple[str, ...], *, required: bool = False,
               default: str | None = None) -> str | None:
        """A string that must be one of ``options``."""
        return self.get(
            key, "str", required=required, default=default, check=lambda v: v in options,
            expected="one of " + ", ".join(options),
        )

    def table(self, key: str, *, required: bool = False) -> Section | None:
        data = self.get(key, "table", required=required)
        path = f"{self.path}.{key}" if self.path else key
        return None if data is None else Section(data, path, self.problems, self.name)

    def tables(self, key: str, *, required: bool = False) -> list[Section]:
        items = self.get(key, "tables", required=required, default=[])
        base = f"{self.path}.{key}" if self.path else key
        return [Section(item, f"{base}[{i}]", self.problems) for i, item in enumerate(items)]

    def finish(self) -> None:
        """Report every key of the table that no reader asked for (typos, stale options)."""
        known = sorted(self.seen)
        for key in self.data:
            if key in self.seen:
                continue
            close = difflib.get_close_matches(key, known, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            self.problem(
                None, f"unknown key {key!r}{hint}", "one of " + ", ".join(known) if known else None
            )


def parse_toml(text: str, file: str) -> dict[str, Any]:
    """Parse TOML text; a syntax error becomes one line with the file, line and column."""
    import re
    import tomllib

    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\s*\(at line (\d+), column (\d+)\)\s*$", msg)
        if m:
            where = f"line {m.group(1)}, column {m.group(2)}"
            msg = msg[: m.start()]
        else:
            end = re.search(r"\s*\(at end of document\)\s*$", msg)
            where = "end of file"
            msg = msg[: end.start()] if end else msg
        raise RigError(f"{file}: {where}: not valid TOML ({msg}), expected TOML syntax") from None
