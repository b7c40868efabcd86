"""Rows of the benchmark table, their verdicts, and the table as text.

A row compares one number (``value``) with one limit: ``op`` is ``">="``, ``">"``, ``"<="`` or
``"<"``; ``ratio`` is ``value / limit``, so a ceiling passes below 1 and a floor above 1. A row
without a limit is informative (``INFO``). A row whose part is missing has ``value`` None and
the reason in ``missing``; it counts as a missed target.
"""

from __future__ import annotations

import math
import operator
from dataclasses import asdict, dataclass
from typing import Literal

from crankbeat.errors import InputError

Op = Literal[">=", ">", "<=", "<"]
Status = Literal["PASS", "MISS", "INFO", "NOT MEASURED"]

_OPS = {">=": operator.ge, ">": operator.gt, "<=": operator.le, "<": operator.lt}


@dataclass
class Row:
    """One figure of the benchmark.

    Attributes
    ----------
    figure : str
        What is measured, e.g. "replay 10 min ÷ python-can iteration".
    measured : str
        The raw numbers behind ``value``, as text ("2.10 s / 4.30 s").
    value : float or None
        The number judged against the target; None when not measured.
    op, limit, unit :
        The target ``value op limit``; ``op`` None for an informative row.
    missing : str
        Why the figure could not be measured (empty when it was).
    """

    figure: str
    measured: str = ""
    value: float | None = None
    op: Op | None = None
    limit: float | None = None
    unit: str = ""
    missing: str = ""

    def __post_init__(self) -> None:
        if self.op is not None and self.op not in _OPS:
            raise InputError(f"row {self.figure!r}: op must be one of {sorted(_OPS)}, "
                             f"got {self.op!r}")
        if (self.op is None) != (self.limit is None):
            raise InputError(f"row {self.figure!r}: give both op and limit, or neither")

    @property
    def status(self) -> Status:
        if self.missing or self.value is None:
            return "NOT MEASURED"
        if self.op is None:
            return "INFO"
        if not math.isfinite(self.value):
            return "MISS"
        return "PASS" if _OPS[self.op](self.value, self.limit) else "MISS"

    @property
    def ratio(self) -> float | None:
        if self.value is None or self.limit in (None, 0):
            return None
        return self.value / self.limit

    @property
    def target(self) -> str:
        if self.op is None:
            return "-"
        return f"{self.op} {_num(self.limit)}{self.unit}"

    def as_dict(self) -> dict:
        d = asdict(self)
        d.update(status=self.status, ratio=self.ratio, target=self.target)
        return d


def missing(figure: str, reason: str, *, op: Op | None = None, limit: float | None = None,
            unit: str = "") -> Row:
    """A row for a figure whose part is missing (``reason`` like "<module> missing")."""
    return Row(figure, op=op, limit=limit, unit=unit, missing=reason)


def _num(x: float | None) -> str:
    if x is None:
        return "-"
    return f"{x:,.0f}" if abs(x) >= 1000 else f"{x:.3g}"


def failed(rows: list[Row]) -> list[Row]:
    """Rows that make the bench fail: missed targets and figures not measured."""
    return [r for r in rows if r.status in ("MISS", "NOT MEASURED")]


def render(rows: list[Row]) -> str:
    """The table as plain text, one row per figure, with a short legend."""
    head = ("figure", "measured", "target", "ratio", "result")
    body = []
    for r in rows:
        measured = r.measured if not r.missing else f"not measured: {r.missing}"
        ratio = "-" if r.ratio is None or r.op is None else f"{r.ratio:.2f}"
        body.append((r.figure, measured, r.target, ratio, r.status))
    widths = [max(len(head[i]), *(len(b[i]) for b in body)) if body else len(head[i])
              for i in range(len(head))]
    line = "  ".join("-" * w for w in widths)
    out = ["  ".join(h.ljust(w) for h, w in zip(head, widths, strict=True)), line]
    out += ["  ".join(c.ljust(w) for c, w in zip(b, widths, strict=True)) for b in body]
    out.append(line)
    out.append("ratio = measured ÷ target limit (a ceiling passes below 1, a floor above 1).")
    out.append("Absolute times are noise on a shared machine; ratios to floors timed in the same "
               "run are the figures to compare.")
    return "\n".join(out)
