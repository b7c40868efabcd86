"""Which analyser produced a run: the package version, a detector revision and a code fingerprint.

A re-analysis keeps earlier results under their analyser version, and a batch skips a ride only
when its stored run has the current version, so the version must change with any change that can
move a stored number for the same input. A hand-kept revision alone was forgotten (it stayed at 1
through several detector changes, which would have made ``batch --stored`` skip rides analysed by
the older code), so the version also carries a fingerprint of the analysing code: the bytes of
every source file of the packages in :data:`ANALYSING_CODE`. A pure refactor moves it too and
costs one needless re-analysis; a missed change of the numbers costs wrong trends.

Bump :data:`DETECTOR_REVISION` by hand with a change of the detector's behaviour, so that people
can tell the versions apart by more than a hash.
"""

from __future__ import annotations

import functools
import hashlib
from importlib import resources

import crankbeat

#: Revision of the detector and the run layer's policies (see the module docstring).
#: 2: dead cylinders of even-firing engines, dead spells by level, partial burns told on the
#: cylinder's own clear misfires, weak spells, folded notes.
DETECTOR_REVISION = 2

#: Where the numbers of a run come from: decoding, time bases, the stages and the run layer.
#: Rig files are not here: a run is keyed by its rig text separately.
ANALYSING_CODE = ("crankbeat.dsp", "crankbeat.logger.run", "crankbeat.logger.can",
                  "crankbeat.logger.serial")
ANALYSING_MODULES = ("stream.py", "timebase.py", "chunks.py")  # of crankbeat.logger


def _sources(package: str):
    """(relative name, bytes) of every .py file under ``package``, in a fixed order."""
    out = []

    def walk(node, prefix: str) -> None:
        for child in sorted(node.iterdir(), key=lambda c: c.name):
            if child.is_dir() and child.name != "__pycache__":
                walk(child, f"{prefix}{child.name}/")
            elif child.name.endswith(".py"):
                out.append((f"{prefix}{child.name}", child.read_bytes()))

    walk(resources.files(package), f"{package}/")
    return out


def analysing_files() -> list[tuple[str, bytes]]:
    """(name, bytes) of every file of the analysing code, in a fixed order."""
    files = [f for pkg in ANALYSING_CODE for f in _sources(pkg)]
    logger = resources.files("crankbeat.logger")
    return files + [(f"crankbeat.logger/{n}", (logger / n).read_bytes())
                    for n in ANALYSING_MODULES]


def fingerprint(files: list[tuple[str, bytes]]) -> str:
    """First 8 hex digits of the SHA-256 over the files' names and contents."""
    h = hashlib.sha256()
    for name, data in files:
        h.update(name.encode("utf-8") + b"\0" + hashlib.sha256(data).digest())
    return h.hexdigest()[:8]


@functools.cache
def code_fingerprint() -> str:
    """:func:`fingerprint` of :func:`analysing_files` (read once per process)."""
    return fingerprint(analysing_files())


def analyser_version() -> str:
    """``"<package version>+r<revision>.<code fingerprint>"``, e.g. ``"0.1.0+r2.1a2b3c4d"``."""
    return f"{crankbeat.__version__}+r{DETECTOR_REVISION}.{code_fingerprint()}"
