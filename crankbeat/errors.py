"""The one exception hierarchy of crankbeat.

It lives beside both packages (``crankbeat.errors``, in neither ``dsp`` nor ``logger``), so that
both raise and catch the same classes without ``dsp`` depending on ``logger``. Every error
carries a message that is already one readable line: the CLI prints ``error: <message>`` and
exits with ``exit_code``.

Errors that have a natural built-in twin inherit it too (a bad argument is also a
``ValueError``, a source timeout also a ``TimeoutError``), so callers may catch either.
Numerically doubtful results are warnings, not errors.

Exit codes of the ``crankbeat`` command (each class's ``exit_code``):

== ==========================================================================================
0  done
1  any other crankbeat error (:class:`CrankbeatError`, e.g. :class:`ExportError`)
2  usage: a command line or argument that cannot be carried out (:class:`UsageError`,
   :class:`InputError`)
3  rig file or preset wrong: file, key and expected range named (:class:`RigError`,
   :class:`UnknownLayoutError`)
4  a CAN log, capture file, bus or port cannot be opened or is not in its format
   (:class:`SourceError`, :class:`FormatError`, :class:`SourceTimeoutError`)
5  the store cannot be opened, written or queried (:class:`StoreError`)
6  the input holds nothing the rig can analyse, e.g. no crank frame of the rig's id
   (:class:`DataError`); nothing is stored
70 an internal error (a bug): the CLI names file and line and asks for a report
130 interrupted (Ctrl-C)
== ==========================================================================================

Damage inside a recording (a bad line, record or frame; a wrong time) is never an error: it is
counted in the stream health, skipped and noted, and the analysis goes on.
"""

from __future__ import annotations


class CrankbeatError(Exception):
    """Root of every error crankbeat raises on purpose."""

    exit_code = 1


class InputError(CrankbeatError, ValueError):
    """An argument to a dsp function is out of its domain (shape, unit, range)."""

    exit_code = 2


class RigError(CrankbeatError, ValueError):
    """A rig file or preset is missing, unreadable or inconsistent.

    The message names the file, the key and what was expected.
    """

    exit_code = 3


class UnknownLayoutError(RigError, LookupError):
    """A crank layout name that is neither a preset layout nor a readable layout file."""


class SourceError(CrankbeatError):
    """A CAN or serial source (live or recorded) cannot be opened or read."""

    exit_code = 4


class SourceTimeoutError(SourceError, TimeoutError):
    """A live source delivered nothing within its timeout."""


class FormatError(SourceError, ValueError):
    """A recording is not in the format it claims (names file and byte offset or line)."""


class StoreError(CrankbeatError):
    """The SQLite store cannot be opened, migrated or queried as asked."""

    exit_code = 5


class RunNotFoundError(StoreError, LookupError):
    """A run id or label names no run in the store."""


class DuplicateRunError(StoreError):
    """The same source files were analysed before (matched by hash)."""


class ExportError(CrankbeatError):
    """An export file could not be written (names the file and why)."""


class DataError(CrankbeatError, ValueError):
    """The input was read but holds nothing the rig can analyse (no crank frames of its id,
    an empty or blank log). The message says what was found instead."""

    exit_code = 6


class UsageError(CrankbeatError, ValueError):
    """A command-line request that cannot be carried out as given."""

    exit_code = 2


class CrankbeatWarning(UserWarning):
    """Root of crankbeat's warnings: results that are computed but doubtful."""


class SyncWarning(CrankbeatWarning):
    """Crank synchronisation was lost or could not be established."""


class LayoutMismatchWarning(CrankbeatWarning):
    """The measured firing pattern fits another layout better than the rig file's."""


class PhaseUnknownWarning(CrankbeatWarning):
    """The 720° phase cannot be known (no cam and an even-firing layout)."""
