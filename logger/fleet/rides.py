"""Which rides a batch analyses: recordings found on disk, or the stored runs' own files.

A ride is one CAN log plus the accelerometer captures recorded with it. On disk they pair by
name, as ``crankbeat ride --record`` and the simulator write them: ``NAME.log`` (or ``.asc``,
``.blf``, ``.trc``; a ``.csv`` log only when named explicitly) with ``NAME.SENSOR.acraw`` beside
it, SENSOR being a sensor of the rig.
"""

from __future__ import annotations

import glob
import hashlib
from dataclasses import dataclass, field
from pathlib import Path

from crankbeat.errors import UsageError
from crankbeat.logger.rig import load_rig
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.run.output import Source
from crankbeat.logger.store import Store, sha256_file

#: CAN log suffixes found when a folder is scanned (python-can reads them all).
LOG_SUFFIXES = (".log", ".asc", ".blf", ".trc")
CAPTURE_SUFFIX = ".acraw"


@dataclass
class Ride:
    """One ride to analyse: its rig, files and the descriptive fields of its run."""

    name: str
    rig: Rig
    can: Path
    accel: dict[str, Path]
    label: str | None = None
    notes: str | None = None
    odometer_km: float | None = None
    sources: list[Source] = field(default_factory=list)

    def hash_sources(self) -> list[Source]:
        """Hash the files (once); the batch's skip key and the stored run's sources."""
        if not self.sources:
            self.sources = [Source(str(self.can), sha256_file(self.can), "can")] + [
                Source(str(p), sha256_file(p), f"accel:{n}") for n, p in self.accel.items()]
        return self.sources


def pair_captures(log: Path, rig: Rig) -> dict[str, Path]:
    """The captures recorded with ``log``: ``<stem>.<sensor>.acraw`` beside it."""
    out = {}
    for sensor in rig.sensors:
        cap = log.with_name(f"{log.stem}.{sensor.name}{CAPTURE_SUFFIX}")
        if cap.is_file():
            out[sensor.name] = cap
    return out


def rides_from_paths(patterns: list[str], rig: Rig) -> list[Ride]:
    """Rides of folders (scanned for logs) and globs or paths of CAN logs, sorted by path."""
    logs: set[Path] = set()
    for pattern in patterns:
        path = Path(pattern)
        if path.is_dir():
            logs |= {p for p in path.iterdir() if p.suffix.lower() in LOG_SUFFIXES}
            continue
        hits = [Path(p) for p in glob.glob(pattern, recursive=True)]
        if not hits:
            raise UsageError(f"'{pattern}' is no folder and matches no file")
        logs |= {p for p in hits if p.is_file() and p.suffix.lower() != CAPTURE_SUFFIX}
    return [Ride(name=str(log), rig=rig, can=log, accel=pair_captures(log, rig),
                 label=log.stem) for log in sorted(logs)]


def rides_from_store(store: Store, *, rig_name: str | None = None,
                     ) -> tuple[list[Ride], list[str]]:
    """Every stored ride (one per set of source files) whose files still exist, with the rig
    text it was analysed with; and one line per ride left out (files gone)."""
    rows = store.db.execute(
        "SELECT runs.id, runs.source_key, rigs.name FROM runs JOIN rigs ON rigs.id = runs.rig_id"
        " WHERE runs.source_key IS NOT NULL ORDER BY runs.id").fetchall()
    newest: dict[str, tuple[int, str]] = {}
    for run_id, key, name in rows:
        if rig_name is None or name == rig_name:
            newest[key] = (run_id, name)
    rides, skipped = [], []
    rigs: dict[str, Rig] = {}
    for run_id, _ in sorted(newest.values()):
        info = store.run(run_id)
        files = {s["kind"]: Path(s["path"]) for s in info["sources"]}
        gone = [str(p) for p in files.values() if not p.is_file()]
        if "can" not in files or gone:
            skipped.append(f"run {run_id}: input file(s) gone: {', '.join(gone) or 'no CAN log'}")
            continue
        text = store.rig_toml(run_id)
        if text not in rigs:
            rigs[text] = stored_rig(store, text)
        accel = {k.split(":", 1)[1]: p for k, p in files.items() if k.startswith("accel:")}
        rides.append(Ride(name=f"run {run_id}", rig=rigs[text], can=files["can"], accel=accel,
                          label=info["label"], notes=info["notes"],
                          odometer_km=info["odometer_km"]))
    return rides, skipped


def stored_rig(store: Store, text: str) -> Rig:
    """The rig a run was analysed with, from its stored text.

    The text is kept as a file beside the store (``<store>.rigs/``) so that the new run names
    the very same rig text.
    """
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]
    folder = Path(str(store.path) + ".rigs")
    folder.mkdir(exist_ok=True)
    path = folder / f"{digest}.toml"
    if not path.is_file():
        path.write_text(text, encoding="utf-8")
    return load_rig(path)
