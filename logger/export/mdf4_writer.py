"""ASAM MDF4 through asammdf (the ``export`` extra): a run any MDF4 viewer opens.

Each table becomes one channel group with the table's time column as its master channel; a
coded column keeps its codes with a value-to-text conversion (the viewer shows "misfire"). MDF
masters must rise: rows without a finite time (an event that never got a TDC time) are left out
and rows are put in time order.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np

from crankbeat.logger.export.base import TableWriter
from crankbeat.logger.export.table import ExportTable


def _text_conversion(labels: dict[int, str]) -> dict:
    conv: dict = {}
    for i, (code, text) in enumerate(sorted(labels.items())):
        conv[f"val_{i}"] = code
        conv[f"text_{i}"] = text.encode("utf-8")
    conv["default"] = b""
    return conv


class Mdf4Writer(TableWriter):
    binary = True
    many_tables = True
    format_name = "MDF4"

    def __init__(self, file, **options) -> None:
        super().__init__(file, **options)
        self._pending: list[ExportTable] = []

    def _write(self, table: ExportTable) -> None:
        self._pending.append(table)  # written at the end, from one time origin

    def _close(self) -> None:
        from asammdf import MDF

        firsts = [np.nanmin(t) for t in (tab.columns[tab.time_column] for tab in self._pending)
                  if np.isfinite(t).any()]
        origin = float(min(firsts)) if firsts else 0.0
        mdf = MDF(version="4.10")
        if 1.0e9 < origin < 4.1e9:  # wall-clock receive times (a candump log)
            mdf.header.start_time = datetime.fromtimestamp(origin, timezone.utc)
        for table in self._pending:
            mdf.append(self._signals(table, origin),
                       comment=f"{table.name}; origin={origin!r}"
                       + "".join(f"; {k}={v}" for k, v in table.meta.items()))
        mdf.save(self.file)
        mdf.close()

    @staticmethod
    def _signals(table: ExportTable, origin: float) -> list:
        from asammdf import Signal

        t = np.asarray(table.columns[table.time_column], float)
        keep = np.flatnonzero(np.isfinite(t))
        keep = keep[np.argsort(t[keep], kind="stable")]
        signals = []
        for name, values in table.columns.items():
            if name == table.time_column:
                continue
            labels = table.labels.get(name)
            signals.append(Signal(
                samples=np.asarray(values)[keep], timestamps=t[keep] - origin, name=name,
                unit=table.units.get(name, ""),
                conversion=_text_conversion(labels) if labels else None))
        return signals
