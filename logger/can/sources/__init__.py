"""CAN sources behind one interface: log files (fast numpy candump path, python-can's readers)
and live python-can buses. :func:`open_log` picks the backend for a file by its suffix."""

from __future__ import annotations

import os
import pathlib

from crankbeat.logger.can.sources.base import CanSource, FrameBatch, concat
from crankbeat.logger.can.sources.bus import BusSource
from crankbeat.logger.can.sources.candump_fast import CandumpFastSource
from crankbeat.logger.can.sources.logfile import LogFileSource

__all__ = ["BusSource", "CanSource", "CandumpFastSource", "FrameBatch", "LogFileSource",
           "concat", "open_log", "LOG_BACKENDS"]

#: Suffix (gzip suffix stripped) -> backend when ``fast=True``; anything else -> LogFileSource.
LOG_BACKENDS: dict[str, type[CanSource]] = {".log": CandumpFastSource}


def open_log(path: str | os.PathLike, *, fast: bool = True) -> CanSource:
    """Open a CAN log of any format python-can reads.

    Parameters
    ----------
    path : str or os.PathLike
        The log (``.log``, ``.asc``, ``.blf``, ``.csv``, ``.trc``, optionally ``.gz``).
    fast : bool
        Use the numpy candump parser for ``.log`` (identical frames, several times faster);
        False reads everything through python-can's ``LogReader``.
    """
    suffixes = [s.lower() for s in pathlib.PurePath(path).suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    backend = LOG_BACKENDS.get(suffixes[-1] if suffixes else "", LogFileSource) if fast \
        else LogFileSource
    return backend(path)
