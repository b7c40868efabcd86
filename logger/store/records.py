"""Rows into the store's shape: file identity, times, JSON-safe values, result records, verdicts.

Pure helpers shared by the writing and the reading side of :class:`~crankbeat.logger.store.Store`.
"""

from __future__ import annotations

import hashlib
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import asdict, is_dataclass
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from crankbeat.dsp.events import VERDICT_NAMES
from crankbeat.errors import StoreError, UsageError

VERDICT_CODES = {name: code for code, name in VERDICT_NAMES.items()}

WINDOW_COLUMNS = ("kind", "idx", "band", "cylinder", "t_start", "t_end", "events", "misfires",
                  "rate")
INTERVAL_COLUMNS = (
    "from_cyl", "to_cyl", "expected_deg", "observed_deg", "stderr_deg", "n", "flagged",
)
VIBRATION_COLUMNS = ("sensor", "rpm_lo", "rpm_hi", "axis", "weighting", "rms", "n")
# Input names that are SQL keywords are stored under a short column name; the others are the
# field names of the dsp results (dsp.analysis.WINDOW_DTYPE, dsp.intervals.IntervalResult).
_ALIASES = {
    "index": "idx", "order": "ord", "counted": "events", "rate_pct": "rate",
    "from_cylinder": "from_cyl", "to_cylinder": "to_cyl", "uncertainty_deg": "stderr_deg",
}
# Fields of those results that are accepted and deliberately not stored.
_NOT_STORED = {"start_cycle", "complete", "spread_deg"}


def sha256_file(path: str | os.PathLike, *, block: int = 1 << 20) -> str:
    """Hex SHA-256 of a file's bytes (the identity of a source file in the store)."""
    h = hashlib.sha256()
    try:
        with open(path, "rb") as f:
            while chunk := f.read(block):
                h.update(chunk)
    except OSError as exc:
        raise StoreError(f"cannot read source file '{path}' to hash it: {exc.strerror}") from None
    return h.hexdigest()


def utc_iso(when: datetime | float | str | None = None) -> str:
    """A time as ISO 8601 UTC text to the second (now when ``when`` is None; floats are epoch s)."""
    if when is None:
        when = datetime.now(timezone.utc)
    elif isinstance(when, str):
        return when
    elif isinstance(when, int | float):
        when = datetime.fromtimestamp(float(when), timezone.utc)
    if when.tzinfo is None:
        when = when.replace(tzinfo=timezone.utc)
    return when.astimezone(timezone.utc).isoformat(timespec="seconds")


def jsonable(obj: Any) -> Any:
    """``obj`` with numpy scalars/arrays, tuples and dataclasses made plain; NaN/inf become None."""
    if is_dataclass(obj) and not isinstance(obj, type):
        obj = asdict(obj)
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, list | tuple | set):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def rig_text(rig: Any) -> str:
    """The rig file's text, so that a run can be understood later without the file."""
    src = str(getattr(rig, "source", "") or "")
    try:
        if src.startswith("preset:"):
            name = src.split(":", 1)[1]
            return (resources.files("crankbeat.logger.presets") / f"{name}.toml").read_text("utf-8")
        if src and Path(src).is_file():
            return Path(src).read_text("utf-8")
    except (OSError, UnicodeDecodeError):
        pass
    return f"# rig source '{src}' was not readable when the run was stored\n"


def records(rows: Any, columns: Sequence[str], what: str) -> list[tuple]:
    """Rows in any of the shapes the analysers produce, as tuples in ``columns`` order.

    Accepted: a numpy structured array, a mapping of column -> sequence, or an iterable of
    mappings / dataclass instances. Absent columns are NULL; unknown ones are an error, so a
    misspelt field does not vanish silently.
    """
    if isinstance(rows, np.ndarray) and rows.dtype.names:
        cols = {_ALIASES.get(n, n): rows[n].tolist() for n in rows.dtype.names
                if n not in _NOT_STORED}
        return _from_columns(cols, columns, what, len(rows))
    if isinstance(rows, Mapping):
        cols = {_ALIASES.get(k, k): list(np.asarray(v).tolist()) for k, v in rows.items()
                if k not in _NOT_STORED}
        lengths = {len(v) for v in cols.values()}
        if len(lengths) > 1:
            raise StoreError(f"{what}: columns have different lengths {sorted(lengths)}")
        return _from_columns(cols, columns, what, lengths.pop() if lengths else 0)
    out = []
    for i, row in enumerate(rows):
        if is_dataclass(row) and not isinstance(row, type):
            row = asdict(row)
        if not isinstance(row, Mapping):
            raise StoreError(f"{what}: row {i} is a {type(row).__name__}, expected a mapping")
        row = {_ALIASES.get(k, k): v for k, v in row.items() if k not in _NOT_STORED}
        unknown = set(row) - set(columns)
        if unknown:
            raise StoreError(
                f"{what}: row {i} has unknown field(s) {sorted(unknown)}, expected {list(columns)}"
            )
        out.append(tuple(jsonable(row.get(c)) for c in columns))
    return out


def _from_columns(cols: dict, columns: Sequence[str], what: str, n: int) -> list[tuple]:
    unknown = set(cols) - set(columns)
    if unknown:
        raise StoreError(f"{what}: unknown field(s) {sorted(unknown)}, expected {list(columns)}")
    series = [cols.get(c, [None] * n) for c in columns]
    return [tuple(jsonable(v) for v in row) for row in zip(*series, strict=True)]


def verdict_code(verdict: str | int) -> int:
    """Verdict code from its name ("misfire") or number."""
    if isinstance(verdict, int | np.integer) and int(verdict) in VERDICT_NAMES:
        return int(verdict)
    text = str(verdict).strip().lower()
    if text.isdigit() and int(text) in VERDICT_NAMES:
        return int(text)
    if text in VERDICT_CODES:
        return VERDICT_CODES[text]
    raise UsageError(
        f"unknown verdict {verdict!r}, expected one of {', '.join(VERDICT_CODES)}"
    )
