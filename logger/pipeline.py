"""A run into the store: replay of recordings and the live ride.

The analysis itself lives in the run layer (:mod:`logger.run`): :class:`RunAnalysis` takes
chunks and hands out steps and a tail, :func:`logger.run.drive.analyse_files` turns recordings
into one :class:`logger.run.output.RunOutput`, and :mod:`logger.run.writer` is the only code that
writes a run into a :class:`logger.store.Store`. This module joins them for the two callers that
work on a store:

- :func:`analyse_replay`: the replay-once check, the priors read from the store, the analysis,
  one write of the whole output (or, paced "as live", the steps as they come);
- :func:`analyse_live`: the priors, then each chunk's step written and committed at once, so a
  reader sees each event a chunk after its data and a ride killed mid-way keeps its events.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from crankbeat.errors import DuplicateRunError
from crankbeat.logger.live.ride import LIVE_CHUNK_S
from crankbeat.logger.rig.model import CanBus, Rig
from crankbeat.logger.run.analysis import (
    FUEL_CUT_OVER_IDLE,
    RunAnalysis,
    StepOutput,
    layout_candidates,
    misfire_settings,
)
from crankbeat.logger.run.drive import REPLAY_CHUNK_S, analyse_files, file_sources
from crankbeat.logger.run.masking import mask_events
from crankbeat.logger.run.output import Priors, RunOutput
from crankbeat.logger.run.teeth import TOOTH_CONFIDENCE_MIN, wheel_key
from crankbeat.logger.run.version import analyser_version
from crankbeat.logger.run.writer import (
    read_priors,
    ride_start,
    store_output,
    write_step,
    write_tail,
)
from crankbeat.logger.run_gate import settle_failed_run
from crankbeat.logger.store import Store

#: A paced replay commits at least this often, s of wall time.
COMMIT_EVERY_S = 0.5

_mask = mask_events  # the name the tests of chunking use


@dataclass
class RunResult:
    """What an analysis into the store returns: the run's id, its summary, and whether the
    files had been analysed before (then ``run_id`` is that earlier run)."""

    run_id: int
    summary: dict
    duplicate: bool = False


def check_not_done(store: Store, sources) -> None:
    """Raise :class:`DuplicateRunError` (with ``run_id``) when these files were analysed before
    (by any analyser version: a re-analysis with a newer one is asked for with ``force``, or
    done by the fleet re-analysis, which keeps both)."""
    earlier = store.find_run_by_sources([s.sha256 for s in sources])
    if earlier is not None:
        err = DuplicateRunError(
            f"these files were analysed before as run {earlier} (force to analyse again)")
        err.run_id = earlier  # type: ignore[attr-defined]
        raise err


def analyse_replay(
    rig: Rig, can_path, accel_paths: dict[str, Path] | None, store: Store, *,
    label: str | None = None, notes: str | None = None, odometer_km: float | None = None,
    pace: float | None = None, force: bool = False, priors: Priors | None = None,
    progress: Callable[[float], None] | None = None,
) -> RunResult:
    """Analyse recordings into a new run of ``store``; library callers and the CLI get the same
    rows (the ride's own start as the run's date when the log keeps wall-clock times).

    ``priors`` default to what the store holds for the rig's wheel. Raises
    :class:`DuplicateRunError` (with ``run_id``) when the same files were analysed before (by
    any analyser version), unless ``force``.
    """
    accel_paths = {n: Path(p) for n, p in (accel_paths or {}).items()}
    sources = file_sources(can_path, accel_paths)
    analyser = analyser_version()
    if not force:
        check_not_done(store, sources)
    priors = priors if priors is not None else read_priors(store, rig)
    if pace is None:
        out = analyse_files(rig, can_path, accel_paths, priors=priors, progress=progress,
                            sources=sources)
        run_id = store_output(store, rig, out, label=label, notes=notes,
                              odometer_km=odometer_km)
        store.delete_unfinished_twins(run_id)  # an interrupted run of these files is replaced
        return RunResult(run_id, out.summary)
    # paced "as live": steps stored as they come, so a killed replay keeps its events
    run_id = store.begin_run(rig, label=label, notes=notes, odometer_km=odometer_km,
                             sources=[(s.path, s.sha256, s.kind) for s in sources],
                             analyser=analyser)
    committer = _Committer(store, COMMIT_EVERY_S)
    # a failure leaves no half-made run; an interruption keeps its events, marked interrupted
    with settle_failed_run(store, run_id):
        out = analyse_files(rig, can_path, accel_paths, priors=priors, pace=pace,
                            progress=progress, sources=sources,
                            on_step=lambda step, chunk: committer.write(run_id, step))
        start = ride_start(out.t_start)
        if start is not None:
            store.update_run(run_id, started_at=start)
        write_tail(store, run_id, out.tail, out.rig_name, out.wheel_key)
    return RunResult(run_id, out.summary)


class _Committer:
    """Writes steps and commits at most every ``every_s`` seconds of wall time."""

    def __init__(self, store: Store, every_s: float) -> None:
        self.store, self.every_s = store, every_s
        self._last = time.monotonic()

    def write(self, run_id: int, step: StepOutput) -> None:
        write_step(self.store, run_id, step)
        now = time.monotonic()
        if now - self._last >= self.every_s:
            self.store.commit()
            self._last = now


def analyse_live(
    rig: Rig, bus: CanBus | None, ports: dict[str, str], store: Store, *,
    record_dir: str | Path | None = None, display=None,
    stop_event: threading.Event | None = None, label: str | None = None,
    notes: str | None = None, odometer_km: float | None = None, chunk_s: float = LIVE_CHUNK_S,
    priors: Priors | None = None,
) -> RunResult:
    """Analyse a live ride until ``stop_event`` is set: :func:`logger.live.ride.ride` (a watched
    bus, write-behind to the store, faults on screen and in the run)."""
    from crankbeat.logger.live.ride import ride

    return ride(rig, bus, ports, store, record_dir=record_dir, display=display,
                stop_event=stop_event, label=label, notes=notes, odometer_km=odometer_km,
                chunk_s=chunk_s, priors=priors)


__all__ = [
    "FUEL_CUT_OVER_IDLE", "LIVE_CHUNK_S", "REPLAY_CHUNK_S", "TOOTH_CONFIDENCE_MIN",
    "RunAnalysis", "RunOutput", "RunResult", "StepOutput", "analyse_live", "analyse_replay",
    "check_not_done", "layout_candidates", "misfire_settings", "wheel_key",
]
