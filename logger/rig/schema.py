"""Typed reading of TOML tables with every problem collected as one line.

A :class:`Section` wraps one TOML table and its key path (``can.message[0].signal[2]``). Each
``get`` checks presence and type, records a problem instead of raising, and remembers which keys
were read, so :meth:`Section.finish` can report the keys nobody asked for (typos).
All problems of one file go to one :class:`Problems`, which raises a single :class:`RigError`.
"""

from __future__ import annotations

import difflib
import math
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

#: Plausible range of every number a rig or layout file may hold, by key: (low, high, unit).
#: Wide enough for any road or race engine and sensor (common practice, from memory); a value
#: outside is a typo or a wrong unit, and would ask for absurd memory or give empty results.
RANGES: dict[str, tuple[float, float, str]] = {
    "teeth": (8, 720, "tooth positions"),
    "missing": (0, 180, "teeth"),
    "tdc_offset_deg": (-720, 720, "deg"),
    "cam_active_level": (0, 1, ""),
    "bitrate": (1_000, 8_000_000, "bit/s"),
    "length": (0, 64, ""),
    "rate_hz": (0.01, 100_000, "Hz"),
    "start_bit": (0, 511, ""),
    "count": (1, 32, ""),
    "saturated_raw": (0, 2**64 - 1, ""),
    "modulo": (2, 2**32, ""),
    "scale": (-1e9, 1e9, ""),
    "offset": (-1e9, 1e9, ""),
    "start": (-4096, 4096, "byte"),
    "end": (-4096, 4096, "byte"),
    "at": (-4096, 4096, "byte"),
    "baud": (300, 20_000_000, "baud"),
    "sample_rate_hz": (1, 100_000, "Hz"),
    "frame_length": (1, 4096, "bytes"),
    "sync": (0, 255, "byte values"),
    "sequence_modulo": (2, 2**32, ""),
    "device_time_modulo": (2, 2**64, ""),
    "device_time_unit_s": (1e-9, 1.0, "s"),
    "idle_rpm": (100, 30_000, "rpm"),
    "rev_limit_rpm": (500, 30_000, "rpm"),
    "interval_tolerance_deg": (0.01, 90, "deg"),
    "misfire_alert_pct": (0, 100, "%"),
    "misfire_threshold": (1e-6, 1e6, ""),
    "stroke_cycle": (2, 4, ""),
    "firing_order": (1, 32, "cylinder numbers"),
    "pin_deg": (-720, 720, "deg"),
    "bank_deg": (-360, 360, "deg"),
    "position_mm": (-5_000, 5_000, "mm"),
    "firing_deg": (-1440, 1440, "deg"),
    "bore_mm": (10, 500, "mm"),
    "stroke_mm": (10, 500, "mm"),
    "conrod_mm": (10, 2_000, "mm"),
    "recip_mass_kg": (0.01, 100, "kg"),
    "inertia_kgm2": (1e-4, 100, "kg m^2"),
}


def _range_text(key: str) -> str:
    lo, hi, unit = RANGES[key]
    return f"a finite number in {lo:g} .. {hi:g}{' ' + unit if unit else ''}"


def _in_range(key: str, value: Any) -> bool:
    """Finite (always) and within :data:`RANGES` (when the key has one)."""
    items = value if isinstance(value, list) else [value]
    for v in items:
        if isinstance(v, float) and not math.isfinite(v):
            return False
        if key in RANGES and not (RANGES[key][0] <= v <= RANGES[key][1]):
            return False
    return True


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
        finite = all(math.isfinite(v) for v in (value if isinstance(value, list) else [value])) \
            if kind in ("int", "float", "ints", "floats") else True
        if finite and check is not None and not check(value):
            self.problem(key, f"got {describe(value)}", expected)
            return default
        if kind in ("int", "float", "ints", "floats") and not _in_range(key, value):
            self.problem(key, f"got {describe(value)}",
                         _range_text(key) if key in RANGES else "a finite number")
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
