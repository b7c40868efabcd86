"""CSV: a header of column names, then one line per row; coded columns as their text.

Times keep microseconds (6 decimals), other numbers 6 significant digits; NaN is an empty
field.
"""

from __future__ import annotations

import csv
import math

from crankbeat.logger.export.base import TableWriter
from crankbeat.logger.export.table import ExportTable


def csv_value(v: object, col: str, time_column: str) -> object:
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return f"{v:.6f}" if col == time_column else f"{v:.6g}"
    return v


class CsvWriter(TableWriter):
    format_name = "CSV"

    def _write(self, table: ExportTable) -> None:
        w = csv.writer(self.file, lineterminator="\n")
        names = list(table.columns)
        w.writerow(names)
        cols = [table.text(c) for c in names]
        tcol = table.time_column
        for row in zip(*cols):
            w.writerow([csv_value(v, c, tcol) for v, c in zip(row, names)])
