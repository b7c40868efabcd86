"""Exports of a run, picked by the file's suffix.

:data:`WRITERS` maps a suffix to a writer (module, class, extra it needs); :func:`open_writer`
opens the right one for a path (or a file object and a suffix). Formats: CSV, JSON, JSON lines,
Parquet (pyarrow) and ASAM MDF4 (asammdf); the last two need ``pip install 'crankbeat[export]'``.
"""

from __future__ import annotations

import importlib
import importlib.util
import os
from pathlib import Path
from typing import IO, Any

from crankbeat.errors import UsageError
from crankbeat.logger.export.base import ExportError, TableWriter
from crankbeat.logger.export.table import ExportTable, channels_table, events_table, run_meta

#: suffix -> (module, class, the library it needs or None)
WRITERS: dict[str, tuple[str, str, str | None]] = {
    ".csv": ("csv_writer", "CsvWriter", None),
    ".json": ("json_writer", "JsonWriter", None),
    ".jsonl": ("json_writer", "JsonLinesWriter", None),
    ".ndjson": ("json_writer", "JsonLinesWriter", None),
    ".parquet": ("parquet_writer", "ParquetWriter", "pyarrow"),
    ".mf4": ("mdf4_writer", "Mdf4Writer", "asammdf"),
    ".mdf": ("mdf4_writer", "Mdf4Writer", "asammdf"),
}


def writer_class(suffix: str) -> type[TableWriter]:
    """The writer of a suffix (".parquet"); a clear error naming the extra when it is missing."""
    suffix = suffix.lower()
    if suffix not in WRITERS:
        raise UsageError(f"no export format for '{suffix or '(no suffix)'}': use one of "
                         + ", ".join(WRITERS))
    module, cls, needs = WRITERS[suffix]
    if needs is not None and importlib.util.find_spec(needs) is None:
        raise UsageError(f"writing {suffix} files needs {needs}: "
                         "pip install 'crankbeat[export]'")
    mod = importlib.import_module(f"crankbeat.logger.export.{module}")
    return getattr(mod, cls)


def open_writer(file: str | os.PathLike | IO[Any], *, suffix: str | None = None,
                **options: Any) -> TableWriter:
    """A writer for ``file``, its format picked by ``suffix`` or by the path's suffix."""
    if suffix is None:
        if not isinstance(file, str | os.PathLike):
            raise UsageError("a file object needs a suffix to pick its format")
        suffix = Path(file).suffix
    return writer_class(suffix)(file, **options)


__all__ = ["WRITERS", "ExportError", "ExportTable", "TableWriter", "channels_table",
           "events_table", "open_writer", "run_meta", "writer_class"]
