"""The floors every replay figure is divided by, timed in the same run on the same files.

* :func:`pycan_iteration` — python-can's bare iteration of a CAN log,
  ``for msg in can.LogReader(path): pass`` (the general reader every format goes through);
* :func:`read_split` — a plain read of the CAN log split into its lines, plus a plain read of
  each capture file: what reading the bytes costs before any decoding.

Both return the best of ``repeat`` runs: on a shared machine the minimum is the least disturbed.
Each run is timed twice over: wall time, and the process's CPU time (``time.process_time``),
which does not count the time other programs held the core; the ratios of the table use CPU
time on both sides.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TypeVar

import can

from crankbeat.errors import InputError

T = TypeVar("T")


@dataclass
class Timing:
    """Best times of ``runs`` runs (each the minimum over the runs) and what one run counted."""

    seconds: float  # wall, s
    cpu_s: float  # CPU of this process, s
    count: int
    runs: int
    what: str = ""


def best_of(fn: Callable[[], T], *, repeat: int = 1) -> tuple[float, float, T]:
    """Run ``fn`` ``repeat`` times; the smallest wall and CPU times (s) and the last result."""
    if repeat < 1:
        raise InputError(f"repeat must be >= 1, got {repeat!r}")
    wall = cpu = float("inf")
    result: T
    for _ in range(repeat):
        c0, t0 = time.process_time(), time.perf_counter()
        result = fn()
        wall = min(wall, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    return wall, cpu, result


def _iterate(path: str) -> int:
    n = 0
    with can.LogReader(path) as reader:
        for _msg in reader:
            n += 1
    return n


def pycan_iteration(path: str | os.PathLike, *, repeat: int = 1) -> Timing:
    """python-can's bare iteration of the log at ``path``: seconds and frames read."""
    wall, cpu, n = best_of(lambda: _iterate(os.fspath(path)), repeat=repeat)
    return Timing(wall, cpu, n, repeat, "frames")


def _read_split(can_path: str, captures: Sequence[str]) -> int:
    with open(can_path, "rb") as f:
        lines = f.read().splitlines()
    for p in captures:
        with open(p, "rb") as f:
            f.read()
    return len(lines)


def read_split(can_path: str | os.PathLike, captures: Sequence[str | os.PathLike] = (), *,
               repeat: int = 1) -> Timing:
    """Read the CAN log and split it into lines, and read every capture file whole.

    ``count`` is the number of lines of the CAN log.
    """
    caps = [os.fspath(p) for p in captures]
    wall, cpu, n = best_of(lambda: _read_split(os.fspath(can_path), caps), repeat=repeat)
    return Timing(wall, cpu, n, repeat, "lines")


def warm_cache(paths: Sequence[str | os.PathLike], *, block: int = 1 << 22) -> int:
    """Read every file once so that no timed run pays for the disk; returns the bytes read."""
    total = 0
    for p in paths:
        with open(p, "rb") as f:
            while chunk := f.read(block):
                total += len(chunk)
    return total
