"""JSON: one array of row objects (``.json``), or one object per line (``.jsonl``, JSON lines).

Coded columns as their text; NaN and infinities as null (JSON has no NaN).
"""

from __future__ import annotations

import json
import math

from crankbeat.logger.export.base import TableWriter
from crankbeat.logger.export.table import ExportTable


def _rows(table: ExportTable):
    names = list(table.columns)
    cols = [table.text(c) for c in names]
    for row in zip(*cols):
        yield {c: (None if isinstance(v, float) and not math.isfinite(v) else v)
               for c, v in zip(names, row)}


class JsonWriter(TableWriter):
    format_name = "JSON"

    def _write(self, table: ExportTable) -> None:
        json.dump(list(_rows(table)), self.file, allow_nan=False)
        self.file.write("\n")


class JsonLinesWriter(TableWriter):
    format_name = "JSON lines"

    def _write(self, table: ExportTable) -> None:
        for row in _rows(table):
            self.file.write(json.dumps(row, allow_nan=False))
            self.file.write("\n")
