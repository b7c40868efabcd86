"""A live ride that keeps going through faults: the analysis of :mod:`logger.pipeline` driven
from a watched bus, with write-behind to the store and the faults on screen and in the run.

* the bus is a :class:`~logger.live.watchdog.WatchedBus`: silence is shown, polled cheaply and
  a lost network link is opened again;
* the store is written through :class:`~logger.live.store_writer.BufferedStore`: a store that
  cannot be written holds nothing up (the recording never waits for it);
* a recording that cannot be written (disk full) stops, says so, and the analysis goes on;
* a ride that saw no crank frame is not stored (one line saying what the bus carried);
* the run is ``complete`` when the rider ends it (Ctrl-C) and ``interrupted`` when a signal
  (SIGTERM, SIGHUP) ended it; either way it gets its summary.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path

import can

from crankbeat.errors import StoreError
from crankbeat.logger import stream
from crankbeat.logger.chunks import Chunk
from crankbeat.logger.live.store_writer import BufferedStore
from crankbeat.logger.live.tally import LiveTally
from crankbeat.logger.live.watchdog import WatchedBus
from crankbeat.logger.rig.model import CanBus, Rig
from crankbeat.logger.run.analysis import RunAnalysis, StepOutput
from crankbeat.logger.run.drive import drive
from crankbeat.logger.run.output import Priors
from crankbeat.logger.run.teeth import wheel_key
from crankbeat.logger.run.version import analyser_version
from crankbeat.logger.run.writer import read_priors, write_step, write_tail

#: Chunk length of a live ride, s: short, since an event reaches the store a chunk after its data.
#: The bus source hands over what arrived every 50 ms at most (``BusSource.max_batch_s``), so a
#: shorter chunk gains nothing: the chunks one batch completes close as one.
LIVE_CHUNK_S = 0.05

#: At the end of a ride, how long to wait for a store that still cannot be written, s.
FINISH_WAIT_S = 30.0
#: Screen refresh, s.
DRAW_EVERY_S = 0.25


def ride(
    rig: Rig, bus: CanBus | can.BusABC | None, ports: dict[str, str], store, *,
    record_dir: str | Path | None = None, display=None,
    stop_event: threading.Event | None = None, stopped_by: Callable[[], str | None] = lambda: None,
    label: str | None = None, notes: str | None = None, odometer_km: float | None = None,
    chunk_s: float = LIVE_CHUNK_S, say: Callable[[str], None] | None = None,
    record_stem: str | None = None, priors: Priors | None = None,
):
    """Analyse a live ride until ``stop_event`` is set; see the module docstring.

    ``stopped_by()`` names the signal that ended the ride when it was not the rider's Ctrl-C
    (the run is then marked ``interrupted``). ``say`` prints a line for the rider (stderr).
    """
    stop_event = stop_event if stop_event is not None else threading.Event()
    tally = LiveTally(rig.engine, interval_tolerance_deg=rig.limits.interval_tolerance_deg)
    t0 = time.monotonic()
    last_draw = [0.0]
    parts: dict = {"recorder": None, "bus": None}
    writer = None

    def faults() -> list[str]:
        lines = [part.state_line() for part in (parts["bus"], parts["recorder"], writer)
                 if part is not None]
        return [line for line in lines if line]

    def draw(force: bool = False) -> None:
        now = time.monotonic()
        if display is None or (not force and now - last_draw[0] < DRAW_EVERY_S):
            return
        state = tally.state(now - t0, recording=str(record_dir) if record_dir else None)
        state.faults = faults()
        display.update(state)
        last_draw[0] = now

    def on_step(out: StepOutput, chunk: Chunk) -> None:
        tally.push_events(out.events)
        if out.masked_spans:
            tally.mask(out.masked_spans)
        if len(chunk.status):
            vals = chunk.status.values
            tally.set_status(
                rpm=float(vals["engine_speed"][-1]) if "engine_speed" in vals else None,
                throttle=float(vals["throttle"][-1]) if "throttle" in vals else None)
        tally.set_health(chunk.health)
        tally.follow(analysis)  # wheel learnt yet, recent vibration
        draw()

    if isinstance(bus, can.BusABC):
        watched = bus  # a WatchedBus made by the caller, or a bus left unwatched
        if isinstance(bus, WatchedBus) and bus.on_idle is None:
            bus.on_idle = lambda _: draw()
    else:
        watched = WatchedBus(bus if bus is not None else rig.can_bus, on_idle=lambda _: draw())
    parts["bus"] = watched if isinstance(watched, WatchedBus) else None
    try:
        priors = priors if priors is not None else _priors_or_none(store, rig, say)
        analysis = RunAnalysis(rig, tooth_correction_deg=priors.tooth_errors_deg)
        writer = BufferedStore(store)
        # the run's row waits with the events: a store locked now does not delay the recording
        run_id = writer.begin_run(rig, label=label, notes=notes, odometer_km=odometer_km,
                                  analyser=analyser_version())
        writer.commit()

        def step(out: StepOutput, chunk: Chunk) -> None:
            # every chunk is committed at once: a reader sees each event a chunk after its data
            write_step(writer, run_id, out)
            writer.commit()
            on_step(out, chunk)

        def last(out: StepOutput) -> None:
            write_step(writer, run_id, out)
            writer.commit()

        try:
            with stream.live(rig, watched, ports, record_dir=record_dir, chunk_s=chunk_s,
                             stop=stop_event, record_stem=record_stem) as chunks:
                parts["recorder"] = getattr(chunks, "recorder", None)
                drive(analysis, chunks, step, last)
        except KeyboardInterrupt:  # a second Ctrl-C: what was analysed is the run
            try:  # flush what the stages hold back (the interrupt may have cut a step short)
                last(analysis.finish())
            except Exception as exc:  # noqa: BLE001 - the run's tail must be stored regardless
                analysis.notes.append(f"the ride was stopped mid-step; its last events are "
                                      f"missing ({type(exc).__name__})")
        draw(force=True)
        if not writer.finish(FINISH_WAIT_S, say=say):
            where = f"; the recording in {record_dir} holds the whole ride: replay it" \
                if record_dir else ""
            raise StoreError(f"store '{store.path}' could not be written for "
                             f"{writer.waiting_s:.0f} s ({writer.last_error}): "
                             f"{writer.pending_rows} rows of the ride are lost{where}")
        run_id = int(run_id)
        census = watched.census if isinstance(watched, WatchedBus) else None
        try:
            analysis.watch.require_analysable(
                watched.channel_info, census=(lambda: census) if census is not None else None)
        except Exception:
            store.delete_run(run_id)
            raise
        analysis.live_fields = _live_fields(parts, writer, stopped_by())
        status = "interrupted" if stopped_by() else "complete"
        tail = analysis.conclude()
        write_tail(store, run_id, tail, rig.name, wheel_key(rig), status=status)
        from crankbeat.logger.pipeline import RunResult

        return RunResult(run_id, tail.summary)
    finally:
        if isinstance(watched, WatchedBus):
            watched.shutdown()


def _priors_or_none(store, rig: Rig, say) -> Priors:
    """The wheel's learnt tooth errors; none when the store cannot be read now (locked)."""
    import sqlite3

    try:
        return read_priors(store, rig)
    except sqlite3.OperationalError as exc:
        if say is not None:
            say(f"store not readable at the start ({exc}): riding without the learnt tooth "
                "errors")
        return Priors(None)


def _live_fields(parts: dict, writer: BufferedStore, signal_name: str | None) -> dict:
    fields: dict = {"store_write_failures": writer.failures,
                    "store_rows_dropped": writer.dropped_rows,
                    "ended_by": signal_name or "rider"}
    lines: list[str] = []
    bus, rec = parts["bus"], parts["recorder"]
    if bus is not None:
        fields.update(bus.summary())
        lines += bus.fault_lines()
    if rec is not None:
        fields["recording_stopped"] = rec.failure
        fields["frames_not_recorded"] = rec.frames_not_recorded
        lines += rec.fault_lines()
    lines += writer.fault_lines()
    if signal_name:
        lines.append(f"the ride was ended by {signal_name} (not by the rider): what was "
                     "analysed up to then is the run")
    fields["live_faults"] = lines
    return fields


__all__ = ["ride"]
