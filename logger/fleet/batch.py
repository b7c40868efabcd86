"""A batch: many rides analysed by a backend, their outputs stored by one writer (this process).

Every ride of a rig gets the same priors, read from the store once when the batch starts, so
the results do not depend on the order rides complete in, nor on the number of workers: each
output equals a one-by-one :func:`logger.run.drive.analyse_files` with those priors. The tooth
errors the rides learn are kept at the end of the batch, in the rides' order (the next batch's
priors), never fed to rides of the same batch.

A ride already analysed from the same files, with the same rig text, by the current analyser
version (a complete run) is skipped, so a batch stopped half-way and started again goes on where
it stopped. Re-analysis by a newer analyser adds a run and keeps the earlier ones.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

from crankbeat.errors import CrankbeatError
from crankbeat.logger.fleet.engine import BatchEngine
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.fleet.task import RideResult
from crankbeat.logger.run.output import Priors
from crankbeat.logger.run.teeth import wheel_key
from crankbeat.logger.run.version import analyser_version
from crankbeat.logger.run.writer import read_priors, save_learnt_teeth, store_output
from crankbeat.logger.store import Store


@dataclass
class BatchReport:
    """What a batch did: run ids per ride stored, rides skipped and failed (one line each)."""

    analyser: str
    stored: dict[str, int] = field(default_factory=dict)  # ride name -> new run id
    skipped: dict[str, int] = field(default_factory=dict)  # ride name -> earlier run id
    failed: dict[str, str] = field(default_factory=dict)  # ride name -> why
    cpu_s: float = 0.0


def run_batch(store: Store, rides: list[Ride], engine: BatchEngine, *,
              progress: Callable[[int, int, str], None] | None = None,
              save_teeth: bool = True) -> BatchReport:
    """Analyse ``rides`` on ``engine`` and store each output as it arrives.

    ``progress(done, total, line)`` is called once per ride finished (stored, failed or
    skipped); ``line`` says which and how.
    """
    analyser = analyser_version()
    report = BatchReport(analyser)
    todo: list[tuple[int, Ride, Priors]] = []
    priors: dict[tuple[str, str], Priors] = {}
    total = len(rides)
    for i, ride in enumerate(rides):
        try:
            sources = ride.hash_sources()
        except (OSError, CrankbeatError) as exc:
            report.failed[ride.name] = f"cannot read its files: {exc}"
            _tell(progress, len(report.failed) + len(report.skipped), total,
                  f"failed  {ride.name}: {report.failed[ride.name]}")
            continue
        earlier = store.find_run_by_sources([s.sha256 for s in sources], analyser=analyser,
                                            rig=ride.rig, complete=True)
        if earlier is not None:
            report.skipped[ride.name] = earlier
            _tell(progress, len(report.failed) + len(report.skipped), total,
                  f"skipped {ride.name}: done before as run {earlier}")
            continue
        key = (ride.rig.name, wheel_key(ride.rig))
        if key not in priors:
            priors[key] = read_priors(store, ride.rig)
        todo.append((i, ride, priors[key]))
    learnt: list[tuple[int, int, RideResult]] = []
    for result in engine.submit_all(todo):
        ride = rides[result.index]
        report.cpu_s += result.cpu_s
        if result.output is None:
            report.failed[ride.name] = result.error or "failed"
            line = f"failed  {ride.name}: {report.failed[ride.name]}"
        else:
            run_id = store_output(store, ride.rig, result.output, label=ride.label,
                                  notes=ride.notes, odometer_km=ride.odometer_km,
                                  save_teeth=False)
            report.stored[ride.name] = run_id
            learnt.append((result.index, run_id, result))
            line = f"stored  {ride.name} as run {run_id}"
        done = len(report.stored) + len(report.failed) + len(report.skipped)
        _tell(progress, done, total, line)
    if save_teeth:  # in the rides' order: the next batch's priors do not depend on timing
        for _index, run_id, result in sorted(learnt, key=lambda x: x[0]):
            out = result.output
            save_learnt_teeth(store, run_id, out.rig_name, out.wheel_key, out.teeth)
    return report


def _tell(progress, done: int, total: int, line: str) -> None:
    if progress is not None:
        progress(done, total, line)
