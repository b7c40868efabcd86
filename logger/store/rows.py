"""A run's rows shaped for the store's tables, apart from writing them.

Shaping (numbers to SQL values, NaN to NULL, grids to bytes, window numbering) is pure and
needs no store: a whole run is shaped into :class:`RunRows` (``logger.run.writer.run_rows``)
and inserted by :meth:`Store.add_rows`; the store's own ``add_*`` methods (live increments)
shape with the same functions, so both paths give the same rows. Rows carry no run id: the
run is known only when the writer begins it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from crankbeat.dsp.events import EVENT_DTYPE
from crankbeat.errors import StoreError
from crankbeat.logger.store.arrays import pack
from crankbeat.logger.store.records import (
    INTERVAL_COLUMNS,
    VIBRATION_COLUMNS,
    WINDOW_COLUMNS,
    records,
)
from crankbeat.logger.store.schema import EVENT_COLUMNS

#: Columns of each table's rows as shaped here (the run id comes first when inserted).
EVENT_ROW = ("seq", *EVENT_COLUMNS)
CHANNEL_ROW = ("name", "t", "value")
ORDER_MAP_COLUMNS = ("sensor", "axis", "n_bands", "n_orders", "rpm_lo", "rpm_hi", "orders",
                     "amplitude")
WINDOW_KINDS = ("rev200", "rev1000", "rpm-band")


@dataclass
class RunRows:
    """Every row of one run for :meth:`Store.add_rows`, each a tuple in its table's column
    order without the run: windows (:data:`~.records.WINDOW_COLUMNS`), channels
    (:data:`CHANNEL_ROW`), intervals, vibration, order maps (:data:`ORDER_MAP_COLUMNS`); the
    events as their :func:`event_table` numbered from 0 (an array: the writer turns it into
    rows a block at a time, so a long ride's events never all become Python objects at once)."""

    events: np.ndarray = field(default_factory=lambda: event_table(np.zeros(0, EVENT_DTYPE)))
    windows: list[tuple] = field(default_factory=list)
    channels: list[tuple] = field(default_factory=list)
    intervals: list[tuple] = field(default_factory=list)
    vibration: list[tuple] = field(default_factory=list)
    order_maps: list[tuple] = field(default_factory=list)


def event_table(events: np.ndarray, start: int = 0) -> np.ndarray:
    """An :data:`dsp.events.EVENT_DTYPE` array (fields matched by name) as the ``events``
    table's columns (:data:`EVENT_ROW`), numbered from ``start``: one ``tolist()`` of it makes
    the rows, with no per-row Python. NaN stays NaN (SQLite stores it as NULL)."""
    events = np.asarray(events)
    missing = set(EVENT_DTYPE.names or ()) - set(events.dtype.names or ())
    if missing:
        raise StoreError(
            f"add_events: array lacks field(s) {sorted(missing)} of dsp.events.EVENT_DTYPE")
    cols = [("seq", np.int64)] + [(c, EVENT_DTYPE.fields[c][0]) for c in EVENT_COLUMNS]
    table = np.empty(len(events), dtype=cols)
    table["seq"] = np.arange(start, start + len(events))
    for name in EVENT_COLUMNS:  # by name: a structured astype would match by position
        table[name] = events[name]
    return table


def event_rows(events: np.ndarray, start: int = 0) -> list[tuple]:
    """The rows of :func:`event_table`."""
    return event_table(events, start).tolist()


def window_rows(rows: Any, kind: str | None = None) -> list[tuple]:
    """Misfire-rate windows (see :meth:`Store.add_windows` for the fields) as rows; ``kind``
    for all rows; cylinder 0 when a row has none; numbered in order when no row has a number
    or a band."""
    recs = records(rows, WINDOW_COLUMNS, "add_windows")
    if kind is not None:
        recs = [(kind, *r[1:]) for r in recs]
    # Rows without a cylinder (the whole-engine windows of dsp.analysis) are cylinder 0.
    recs = [(*r[:3], 0 if r[3] is None else r[3], *r[4:]) for r in recs]
    if recs and all(r[1] is None and r[2] is None for r in recs):
        recs = [(r[0], i, *r[2:]) for i, r in enumerate(recs)]
    bad = {r[0] for r in recs} - set(WINDOW_KINDS)
    if bad:
        raise StoreError(f"add_windows: unknown kind(s) {sorted(map(str, bad))}, "
                         "expected rev200, rev1000 or rpm-band")
    return recs


def channel_rows(channels: Mapping[str, tuple]) -> list[tuple]:
    """Status channels ``{name: (t, value)}`` as rows; a value that is not finite is NULL."""
    rows: list[tuple] = []
    for name, (t, v) in channels.items():
        t, v = np.asarray(t, float), np.asarray(v, float)
        rows += [(str(name), a, b if math.isfinite(b) else None)
                 for a, b in zip(t.tolist(), v.tolist())]
    return rows


def interval_rows(rows: Any) -> list[tuple]:
    return records(rows, INTERVAL_COLUMNS, "add_intervals")


def vibration_rows(rows: Any) -> list[tuple]:
    return records(rows, VIBRATION_COLUMNS, "add_vibration")


def order_map_row(sensor: str, axis: str, rpm_lo: Sequence[float], rpm_hi: Sequence[float],
                  orders: Sequence[float], amplitude: Any) -> tuple:
    """One order map as an ``order_maps`` row (:data:`ORDER_MAP_COLUMNS`).

    ``amplitude[b, k]`` is band b (``rpm_lo[b]``..``rpm_hi[b]``) at ``orders[k]``. Bands never
    visited (all NaN) are left out; a value that is not finite is kept as NaN (no value).
    """
    amp = np.asarray(amplitude, dtype=float)
    lo, hi, orders = (np.asarray(a, dtype=float).ravel() for a in (rpm_lo, rpm_hi, orders))
    if amp.shape != (len(lo), len(orders)) or len(hi) != len(lo):
        raise StoreError(
            f"add_order_map: amplitude shape {amp.shape} does not match "
            f"{len(lo)} bands x {len(orders)} orders"
        )
    visited = ~np.all(np.isnan(amp), axis=1)
    kept = np.where(np.isfinite(amp[visited]), amp[visited], np.nan)
    return (str(sensor), str(axis), int(visited.sum()), len(orders), pack(lo[visited]),
            pack(hi[visited]), pack(orders), pack(kept))


def order_map_rows(maps: Sequence[Mapping]) -> list[tuple]:
    """Order maps (keyword arguments of :meth:`Store.add_order_map`) as rows; maps with no
    visited band give none."""
    rows = [order_map_row(m["sensor"], m.get("axis", "sum"), m["rpm_lo"], m["rpm_hi"],
                          m["orders"], m["amplitude"]) for m in maps]
    return [r for r in rows if r[2]]
