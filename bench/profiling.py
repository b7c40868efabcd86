"""The profile table: crankbeat's own functions from a cProfile dump, ranked.

Two short lists from one ``pstats`` file: the stages by cumulative time (where the time goes,
callees included) and the hot spots by own time (where to optimise). Only functions in the
project's ``logger/`` and ``dsp/`` count as stages; library functions show among hot spots,
because time spent in numpy or sqlite3 on the project's behalf is where it goes.
"""

from __future__ import annotations

import os
import pstats
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
_PROJECT = tuple(str(ROOT / d) + os.sep for d in ("logger", "dsp"))


@dataclass
class ProfileLine:
    where: str  # "logger/pipeline.py:221 _drive" or "~ <built-in method ...>"
    calls: int
    own_s: float
    cum_s: float


def _where(func: tuple[str, int, str]) -> str:
    path, line, name = func
    if path.startswith(str(ROOT) + os.sep):
        return f"{os.path.relpath(path, ROOT)}:{line} {name}"
    if path == "~":
        return name
    parts = Path(path).parts
    short = "/".join(parts[parts.index("site-packages") + 1:]) if "site-packages" in parts \
        else Path(path).name
    return f"{short}:{line} {name}"


def _lines(path: str | os.PathLike) -> list[tuple[tuple[str, int, str], ProfileLine]]:
    stats = pstats.Stats(str(path))
    out = []
    for func, (_cc, nc, tt, ct, _callers) in stats.stats.items():  # type: ignore[attr-defined]
        out.append((func, ProfileLine(_where(func), int(nc), float(tt), float(ct))))
    return out


def stages(path: str | os.PathLike, *, top: int = 12) -> list[ProfileLine]:
    """Project functions by cumulative time, largest first."""
    rows = [p for f, p in _lines(path) if f[0].startswith(_PROJECT)]
    return sorted(rows, key=lambda p: p.cum_s, reverse=True)[:top]


def hot_spots(path: str | os.PathLike, *, top: int = 8) -> list[ProfileLine]:
    """Any function by own time, largest first."""
    rows = [p for _f, p in _lines(path)]
    return sorted(rows, key=lambda p: p.own_s, reverse=True)[:top]


def total_seconds(path: str | os.PathLike) -> float:
    return float(pstats.Stats(str(path)).total_tt)  # type: ignore[attr-defined]


def render(path: str | os.PathLike, *, top_stages: int = 12, top_spots: int = 8) -> str:
    """Both lists as one short text table."""
    total = total_seconds(path) or 1.0
    out = []
    for title, rows, key in (("stages by cumulative time", stages(path, top=top_stages), "cum"),
                             ("hot spots by own time", hot_spots(path, top=top_spots), "own")):
        width = max([len(r.where) for r in rows] + [len(title)])
        out.append(f"{title.ljust(width)}  {'calls':>9}  {'own s':>8}  {'cum s':>8}  {key} %")
        for r in rows:
            share = (r.cum_s if key == "cum" else r.own_s) / total * 100.0
            out.append(f"{r.where.ljust(width)}  {r.calls:>9}  {r.own_s:>8.3f}  {r.cum_s:>8.3f}"
                       f"  {share:5.1f}")
        out.append("")
    out.append(f"(profiled total {total:.2f} s; cProfile slows Python-heavy code more than numpy)")
    return "\n".join(out)
