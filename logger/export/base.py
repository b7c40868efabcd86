"""The base of every export writer: a context manager over a path or an open file.

As python-can's log writers: ``with Writer(path_or_file) as w: w.write(table)``. Given a path,
the writer opens (and closes) the file; given a file object, it writes to it and leaves it open.
A writer of a flat format takes one table; a container format (MDF4) takes several.
"""

from __future__ import annotations

import os
from typing import IO, Any

from crankbeat.errors import ExportError
from crankbeat.logger.export.table import ExportTable


class TableWriter:
    """Write :class:`ExportTable` values to a file. Subclasses set :attr:`binary` and
    :attr:`many_tables` and implement :meth:`_write` (and :meth:`_close` if they buffer)."""

    #: the file is opened in binary mode
    binary = False
    #: more than one table may go into one file
    many_tables = False
    #: what the format is called in messages
    format_name = "file"

    def __init__(self, file: str | os.PathLike | IO[Any], **options: Any) -> None:
        self.options = options
        self._tables = 0
        if isinstance(file, str | os.PathLike):
            self.path = str(file)
            try:
                self.file = (open(file, "wb") if self.binary
                             else open(file, "w", newline="", encoding="utf-8"))
            except OSError as exc:
                raise ExportError(f"cannot write '{file}': {exc.strerror}") from None
            self._own = True
        else:
            self.path, self.file, self._own = getattr(file, "name", "<stream>"), file, False

    def write(self, table: ExportTable) -> None:
        if self._tables and not self.many_tables:
            raise ExportError(f"a {self.format_name} file holds one table; "
                              f"'{table.name}' is a second one")
        self._tables += 1
        self._write(table)

    def _write(self, table: ExportTable) -> None:
        raise NotImplementedError

    def _close(self) -> None:
        """Flush what a container format keeps until the end."""

    def stop(self) -> None:
        try:
            self._close()
        finally:
            if self._own:
                self.file.close()
            else:
                self.file.flush()

    def __enter__(self) -> TableWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
