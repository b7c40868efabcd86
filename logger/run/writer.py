"""The run layer's one door to the store: priors in, outputs and increments out.

:func:`store_output` writes a whole :class:`RunOutput` in one transaction (replay, fleet),
from rows shaped by :func:`run_rows`;
:func:`write_step` writes a live step at once, and :func:`write_tail` the end of a live run.
Both paths give the same rows: a live writer masks its events later by span, a whole output
carries them masked.
"""

from __future__ import annotations

from crankbeat.logger.rig.model import Rig
from crankbeat.logger.run.analysis import StepOutput
from crankbeat.logger.run.output import Priors, RunOutput, RunTail
from crankbeat.logger.run.teeth import LearntTeeth, wheel_key
from crankbeat.logger.store import Store
from crankbeat.logger.store.rows import (
    RunRows,
    channel_rows,
    event_table,
    interval_rows,
    order_map_rows,
    vibration_rows,
    window_rows,
)

#: Epoch seconds that can be a ride's start (2001 .. 2100); logs with relative times start near 0.
PLAUSIBLE_EPOCH = (1.0e9, 4.1e9)


def read_priors(store: Store, rig: Rig) -> Priors:
    """The priors a new run of ``rig`` gets from the store: the wheel's latest tooth errors."""
    return Priors(store.load_tooth_errors(rig.name, wheel_key(rig)))


def ride_start(t_start) -> float | None:
    """The ride's own start (epoch s) when the log keeps wall-clock times, else None.

    A candump log keeps wall-clock receive times: the ride's own start is the run's date, so
    trends by date follow the rides, not the day they were replayed.
    """
    if isinstance(t_start, int | float) and PLAUSIBLE_EPOCH[0] < t_start < PLAUSIBLE_EPOCH[1]:
        return float(t_start)
    return None


def write_step(store: Store, run_id: int, step: StepOutput) -> None:
    """Store what one chunk produced (no commit)."""
    if len(step.events):
        store.add_events(run_id, step.events)
    if step.masked_spans:
        store.mask_events(run_id, step.masked_spans)
    for kind, rows in step.windows.items():
        store.add_windows(run_id, rows, kind=kind)
    if step.channels:
        store.add_channels(run_id, step.channels)


def write_tail(store: Store, run_id: int, tail: RunTail, rig_name: str, key: str, *,
               status: str = "complete", save_teeth: bool = True) -> None:
    """Store the end of a run and finish it (commits)."""
    store.add_intervals(run_id, tail.intervals)
    if tail.vibration:
        store.add_vibration(run_id, tail.vibration)
    for m in tail.order_maps:
        store.add_order_map(run_id, **m)
    if save_teeth:
        save_learnt_teeth(store, run_id, rig_name, key, tail.teeth)
    store.finish_run(run_id, tail.summary, status=status)


def save_learnt_teeth(store: Store, run_id: int, rig_name: str, key: str, teeth: LearntTeeth,
                      *, learnt_at=None) -> bool:
    """Keep the tooth errors a run learnt for the next runs of the rig (when confident)."""
    if not teeth.keep:
        return False
    store.save_tooth_errors(rig_name, key, teeth.error_deg, run_id=run_id,
                            n_revs=teeth.n_revolutions, learnt_at=learnt_at)
    return True


def run_rows(out: RunOutput) -> RunRows:
    """Every row ``out`` stores, shaped (no store needed)."""
    return RunRows(
        events=event_table(out.events),
        windows=[r for kind, rows in out.windows.items() for r in window_rows(rows, kind)],
        channels=channel_rows(out.channels) if out.channels else [],
        intervals=interval_rows(out.tail.intervals),
        vibration=vibration_rows(out.tail.vibration) if out.tail.vibration else [],
        order_maps=order_map_rows(out.tail.order_maps),
    )


def store_output(store: Store, rig: Rig, out: RunOutput, *, label: str | None = None,
                 notes: str | None = None, odometer_km: float | None = None,
                 save_teeth: bool = True) -> int:
    """Store a whole run; return its id. One transaction: a crash leaves nothing half-written
    but the run row itself (status "incomplete").

    The rows are shaped first (:func:`run_rows`), then inserted. Shaping them on a fleet
    worker instead was measured and dropped: the writer's CPU per 1-min ride stayed the same
    (76-89 ms either way; SQLite's inserts are most of it) and the worker's result doubled
    to 1.3 MB, since the output must stay whole.
    """
    run_id = store.begin_run(
        rig, label=label, notes=notes, odometer_km=odometer_km,
        sources=[(s.path, s.sha256, s.kind) for s in out.sources],
        started_at=ride_start(out.t_start), analyser=out.analyser, commit=False)
    store.add_rows(run_id, run_rows(out))
    if save_teeth:
        save_learnt_teeth(store, run_id, out.rig_name, out.wheel_key, out.tail.teeth)
    store.finish_run(run_id, out.tail.summary)
    return run_id
