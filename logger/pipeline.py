"""One run's analysis: a stream of chunks through the dsp stages into the store.

Live and replay share everything after the source. :func:`analyse_replay` and
:func:`analyse_live` differ only in the stream (:func:`logger.stream.replay` or
:func:`logger.stream.live`) and in the live display; :class:`RunAnalysis` does the work:

1. :class:`dsp.analysis.EventAnalyzer` turns tooth frames and status into final events
   (fired, misfire, unusable, fuel cut).
2. :class:`dsp.vibration.VibrationAnalyzer` takes the accelerometer and the crank edges and
   reports rough-road spans as they close.
3. The store receives each event as soon as it is final (low latency), and later an update that
   masks the events inside each rough-road span (verdict "masked").
4. :class:`logger.run_summary.RunSummary` summarises the run block by block, once the masking of
   a block is known, so memory stays bounded whatever the ride length.

The store is committed at least every :data:`COMMIT_EVERY_S` seconds of wall time, so a ride
killed mid-way keeps every event up to the last commit, in a run marked incomplete.
"""

from __future__ import annotations

import threading
import time
import warnings
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from crankbeat.dsp.analysis import EventAnalyzer
from crankbeat.dsp.crank import CrankAngles
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import FIRED, FUEL_CUT, MASKED, MISFIRE
from crankbeat.dsp.intervals import SpeedProfile
from crankbeat.dsp.misfire import MisfireSettings
from crankbeat.dsp.toothcal import ToothErrorLearner
from crankbeat.dsp.vibration import SensorSpec, VibrationAnalyzer, VibrationSummary, merge_spans
from crankbeat.errors import CrankbeatWarning, DuplicateRunError
from crankbeat.logger import stream
from crankbeat.logger.chunks import Chunk, StreamHealth
from crankbeat.logger.notes import decisive_notes, ranked_notes, stream_fields
from crankbeat.logger.rig import list_layouts, load_layout
from crankbeat.logger.rig.model import CanBus, Rig
from crankbeat.logger.run_gate import RunWatch, log_census, settle_failed_run
from crankbeat.logger.run_summary import WINDOW_KINDS, RunSummary
from crankbeat.logger.store import Store, sha256_file

COMMIT_EVERY_S = 0.5
#: Chunk length of a replay on the CAN clock, s. Every stage gives the same numbers whatever the
#: chunking (tests hold them equal); longer chunks than the live 0.2 s spare per-call overheads.
REPLAY_CHUNK_S = 2.0
#: Chunk length of a live ride, s: short, since an event reaches the store a chunk after its data.
LIVE_CHUNK_S = 0.1
#: How long events wait for the rough-road verdict before they are summarised without it, s
#: of CAN time (a board that fell silent must not hold the summaries back for ever).
MASK_WAIT_LIMIT_S = 5.0
#: Fuel cut is looked for above this multiple of the rig's idle speed.
FUEL_CUT_OVER_IDLE = 1.25
#: Learnt tooth errors are kept for later runs when the fit is at least this confident (0..1).
TOOTH_CONFIDENCE_MIN = 0.5
#: A run on an uncorrected wheel applies what its own first fuel cut taught, when the fit is this
#: confident and rests on this many revolutions, from this long after the cut (CAN time, s: the
#: switch must not depend on how the stream is chunked: longer than a replay chunk plus the
#: few cycles an event waits for its verdict).
IN_RUN_CONFIDENCE, IN_RUN_MIN_REVOLUTIONS, IN_RUN_DELAY_S = 0.9, 100, 4.0
#: A stored correction agrees with the run's own when they differ by at most this (deg rms), or
#: this share of the errors' own rms: then the stored one stays.
STORED_AGREES_DEG, STORED_AGREES_SHARE = 0.01, 0.25
#: Longest rough-road span whose events are held back for the summaries, s (the store's events
#: are masked however long the span lasts).
OPEN_SPAN_LIMIT_S = 300.0


@dataclass
class RunResult:
    """What an analysis returns: the run's id in the store and its summary."""

    run_id: int
    summary: dict
    duplicate: bool = False


def wheel_key(rig: Rig) -> str:
    """The store's key of a trigger wheel: learnt tooth errors belong to one wheel of one rig."""
    w = rig.wheel
    return f"{w.teeth}-{w.missing}@{w.tdc_offset_deg:g}"


def layout_candidates(engine: Engine) -> dict[str, Engine]:
    """Shipped layouts with the engine's cylinder count, plus the engine itself."""
    out = {}
    for name in list_layouts():
        eng = load_layout(name)
        if eng.n_cylinders == engine.n_cylinders:
            out[name] = eng.with_geometry(
                bore_m=engine.bore_m, stroke_m=engine.stroke_m, conrod_m=engine.conrod_m,
                recip_mass_kg=engine.recip_mass_kg, inertia_kgm2=engine.inertia_kgm2)
    out[engine.name] = engine
    return out


def misfire_settings(rig: Rig) -> MisfireSettings:
    """Detector settings: the defaults, with what the rig file says about this engine.

    The overrun fuel cut is looked for only clearly above the rig's idle speed (an ECU cuts fuel
    on a closed throttle above idle and resumes near it, common practice).
    """
    options: dict = {"fuel_cut_min_rpm": FUEL_CUT_OVER_IDLE * rig.limits.idle_rpm}
    if rig.limits.misfire_threshold is not None:
        options["threshold"] = rig.limits.misfire_threshold
    return MisfireSettings(**options)


@dataclass
class StepOutput:
    """What one chunk produced: events now final, and spans whose events are now masked."""

    events: np.ndarray
    masked_spans: list[tuple[float, float]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


class RunAnalysis:
    """The streaming analysis of one run (no I/O: chunks in, events and summaries out).

    Parameters
    ----------
    rig : Rig
    tooth_correction_deg : (real_teeth,) array or None
        Tooth errors learnt on an earlier run of the same wheel.
    """

    def __init__(self, rig: Rig, *, tooth_correction_deg: np.ndarray | None = None) -> None:
        self.rig = rig
        engine = rig.engine
        self.events = EventAnalyzer(
            engine, rig.wheel, settings=misfire_settings(rig),
            tooth_correction_deg=tooth_correction_deg,
        )
        specs = [SensorSpec.of(s) for s in rig.sensors]
        self.vibration = VibrationAnalyzer(engine, specs) if specs else None
        self.vib_summary: VibrationSummary | None = None  # set by finish()
        self.summary = RunSummary(engine, engine.name, layout_candidates(engine),
                                  tolerance_deg=rig.limits.interval_tolerance_deg)
        self.health = StreamHealth()
        self.notes: list[str] = []
        self.watch = RunWatch(rig)  # the gate's crank count, accelerometer breaks
        self.live_fields: dict = {}  # live faults (link, store, recording), stored with the run
        self._held: list[np.ndarray] = []  # events waiting for the rough-road verdict
        self._spans: list[tuple[float, float]] = []  # closed spans that may still touch held events
        self._accel_done = {s.name: -np.inf for s in specs}  # accelerometer accounted up to, s
        self._accel_seen = {s.name: False for s in specs}
        self._last_event_t = -np.inf
        self.rough_spans: list[tuple[float, float]] = []
        self.correction_from_store = tooth_correction_deg is not None
        self._correction = (None if tooth_correction_deg is None
                            else np.asarray(tooth_correction_deg, dtype=float))
        self.corrected_in_run = False
        self.replaced_stored = False  # the stored errors disagreed with this run's own
        self.teeth = _FuelCutLearner(ToothErrorLearner(rig.wheel, engine),
                                     self.events.settings)
        # the layout check's speed profile: the analyzer's own, or one restarted where a
        # tooth-error correction learnt mid-run takes effect (uncorrected teeth bend the profile)
        self.profile = self.events.profile
        self._profile_from: float | None = None

    @property
    def tooth_correction_applied(self) -> bool:
        """Some learnt tooth errors correct (part of) this run: stored ones, or its own."""
        return self.correction_from_store or self.corrected_in_run

    # -- per chunk -----------------------------------------------------------------------
    def push(self, chunk: Chunk) -> StepOutput:
        te = chunk.teeth
        status_t = chunk.status.t if len(chunk.status) else None
        throttle = chunk.status.values.get("throttle") if len(chunk.status) else None
        step = self.events.push(te.frame_time, te.periods, te.cam, te.lost_before,
                                status_t=status_t, throttle=throttle)
        self.health = chunk.health
        self.teeth.push(step.crank, step.events)
        self._maybe_correct_teeth()
        self._add_to_profile(step.crank)
        out = StepOutput(step.events, notes=list(step.notes))
        new_spans = []
        if self.vibration is not None:
            accel = {n: (b.t, b.xyz, b.gap_before) for n, b in chunk.accel.items() if len(b)}
            for name in accel:
                self._accel_seen[name] = True
            crank = step.crank
            vstep = self.vibration.push(accel, (crank.t, crank.angle, crank.valid))
            for name, t in vstep.t_done.items():
                self._accel_done[name] = max(self._accel_done[name], t)
            for spans in vstep.rough_spans.values():
                new_spans += spans
        self._hold(step.events, new_spans, out, end_time=chunk.end_time)
        self.notes += out.notes
        self.watch.push(chunk, step.events)
        return out

    def finish(self) -> StepOutput:
        step = self.events.finish()
        self.teeth.push(step.crank, step.events, final=True)
        self._add_to_profile(step.crank)
        out = StepOutput(step.events, notes=list(step.notes))
        new_spans = []
        if self.vibration is not None:
            crank = step.crank
            if len(crank.t):
                self.vibration.push({}, (crank.t, crank.angle, crank.valid))
            self.vib_summary = self.vibration.finish()
            new_spans = self.vib_summary.rough_spans_all
        self._hold(step.events, new_spans, out, end_time=np.inf, final=True)
        self.watch.finish(step.events)
        self.summary.finish()
        self.notes += out.notes
        return out

    def _maybe_correct_teeth(self) -> None:
        closed_at = self.teeth.take_closed()
        if closed_at is None or self.corrected_in_run:
            return
        learnt = self.teeth.result()
        if learnt.confidence < IN_RUN_CONFIDENCE or learnt.n_revolutions < IN_RUN_MIN_REVOLUTIONS:
            return
        if self._correction is not None:
            # a stored correction is for this rig's wheel; a wheel changed since (or a store
            # shared by several bikes) shows as a disagreement with what this run learns
            off = float(np.sqrt(np.mean((learnt.error_deg - self._correction) ** 2)))
            if off <= max(STORED_AGREES_DEG, STORED_AGREES_SHARE * learnt.rms_deg):
                return
            self.replaced_stored = True
            self.notes.append(
                f"the tooth errors stored for this rig differ from this run's by {off:.3f} deg "
                "rms (another wheel?): this run's own are applied from the time below")
        from_time = closed_at + IN_RUN_DELAY_S
        self.events.tracker.schedule_tooth_correction(learnt.error_deg, from_time)
        self.summary.intervals_from(from_time)
        old = self.events.profile
        self.profile = SpeedProfile(old.cycle_deg, old.bin_deg)
        self._profile_from = from_time
        self.corrected_in_run = True
        self._correction = learnt.error_deg
        self.notes.append(
            f"tooth spacing errors of {learnt.rms_deg:.3f} deg rms learnt on the fuel cut ending "
            f"at t={closed_at:.1f} s are applied from t={from_time:.1f} s; the firing intervals "
            "of this run are taken from then on")

    def _add_to_profile(self, crank: CrankAngles) -> None:
        if self._profile_from is None or not len(crank):
            return  # the analyzer keeps its own profile up to date
        late = int(np.searchsorted(crank.t, self._profile_from, side="left"))
        if late < len(crank):
            self.profile.add(_take(crank, late, len(crank)))

    # -- rough-road masking --------------------------------------------------------------
    def _hold(self, events: np.ndarray, new_spans, out: StepOutput, *, end_time: float,
              final: bool = False) -> None:
        if new_spans:
            merged = merge_spans(list(new_spans))
            self._spans = merge_spans(self._spans + merged)
            self.rough_spans = merge_spans(self.rough_spans + merged)
            out.masked_spans = merged
        if len(events):
            self._held.append(events.copy())
            self._last_event_t = float(np.nanmax(np.r_[events["t"], self._last_event_t]))
        if not self._held:
            return
        held = np.concatenate(self._held)
        _mask(held, self._spans)
        if final or self.vibration is None:
            ready = len(held)
        else:
            decided = self._rough_decided_until(end_time)
            ready = int(np.searchsorted(held["t"], decided, side="right"))
        self.summary.push(held[:ready])
        self._held = [held[ready:]] if ready < len(held) else []
        oldest = held["t"][ready] if ready < len(held) else self._last_event_t
        self._spans = [s for s in self._spans if s[1] >= oldest]

    def _rough_decided_until(self, end_time: float) -> float:
        """Events up to this time know their rough-road verdict (spans report as they close)."""
        boards = self.vibration.boards.values()
        lag = max((b.rough.window_frames * b.rough.frame_s + b.rough.hold_s + 2 * b.rough.frame_s
                   for b in boards), default=0.0)
        seen = [t for n, t in self._accel_done.items() if self._accel_seen[n]]
        decided = (min(seen) - lag) if seen else -np.inf
        # a silent board (unplugged, or none recorded) must not hold the summaries for ever
        decided = max(decided, end_time - MASK_WAIT_LIMIT_S)
        open_since = [b.rough.open_since for b in boards if b.rough.open_since is not None]
        if open_since:  # an open span already holds its start (one window before it opened)
            decided = min(decided, max(min(open_since), end_time - OPEN_SPAN_LIMIT_S))
        return decided


class _FuelCutLearner:
    """Feeds the tooth-error learner the crank edges of the fuel-cut stretches.

    Fuel cut is known per event (verdict FUEL_CUT: the throttle is closed and no cylinder
    fires), and events are decided a few cycles after their edges: edges wait here until the
    events around them are decided, so the learner sees each edge once, in order.
    """

    def __init__(self, learner: ToothErrorLearner, settings: MisfireSettings) -> None:
        self.learner = learner
        self.closed_throttle_pct = settings.closed_throttle_pct
        self.overrun_min_rpm = settings.fuel_cut_min_rpm
        self._parts: list[CrankAngles] = []
        self._spans: list[tuple[float, float]] = []  # closed fuel-cut stretches (TDC times)
        self._open: float | None = None  # start of a stretch still going on
        self._last: float = -np.inf  # TDC time of the last fuel-cut event seen
        self._decided: float = -np.inf  # events are decided up to this time
        self._closed_at: float | None = None  # a stretch ended at this event time (not yet taken)

    def push(self, crank: CrankAngles, events: np.ndarray, *, final: bool = False) -> None:
        if len(events):
            self._take_events(events)
        if len(crank):
            self._parts.append(crank)
        if not self._parts:
            return
        edges = CrankAngles.concat(self._parts)
        cut = len(edges) if final else int(np.searchsorted(edges.t, self._decided, side="right"))
        spans = list(self._spans)
        if self._open is not None:
            spans.append((self._open, self._last))
        if cut:
            self.learner.push(_take(edges, 0, cut), np.array(spans, float).reshape(-1, 2))
        self._parts = [_take(edges, cut, len(edges))] if cut < len(edges) else []
        oldest = self._parts[0].t[0] if self._parts else self._decided
        self._spans = [s for s in self._spans if s[1] >= oldest]

    def _take_events(self, events: np.ndarray) -> None:
        t = events["t"]
        # overrun as the ECU's status tells it, too: with large tooth errors the uncorrected
        # work estimate can look like combustion, and the learning must not wait for the very
        # correction it is to provide; a fit spoilt by real combustion shows in its confidence
        overrun = ((events["throttle"] <= self.closed_throttle_pct)
                   & (events["rpm"] >= self.overrun_min_rpm)
                   & np.isin(events["verdict"], (FIRED, FUEL_CUT)))
        cut = (events["verdict"] == FUEL_CUT) | overrun
        for ti, is_cut in zip(t, cut):
            if not np.isfinite(ti):
                continue
            if is_cut:
                if self._open is None:
                    self._open = float(ti)
                self._last = float(ti)
            elif self._open is not None:
                self._spans.append((self._open, self._last))
                self._open = None
                self._closed_at = float(ti)
        finite = t[np.isfinite(t)]
        if finite.size:
            self._decided = max(self._decided, float(finite.max()))

    def result(self):
        return self.learner.result()

    def take_closed(self) -> float | None:
        """Time of the event that ended the latest fuel-cut stretch, once; None if none."""
        closed, self._closed_at = self._closed_at, None
        return closed


def _take(c: CrankAngles, a: int, b: int) -> CrankAngles:
    return CrankAngles(c.t[a:b], c.angle[a:b], c.tooth[a:b], c.valid[a:b], c.period[a:b], [])


def _mask(events: np.ndarray, spans: list[tuple[float, float]]) -> np.ndarray:
    """Mark fired/misfire events inside a rough-road span MASKED (in place); return the mask."""
    hit = np.zeros(len(events), bool)
    if not spans or not len(events):
        return hit
    t = events["t"]
    for a, b in spans:
        hit |= (t >= a) & (t <= b)
    hit &= np.isin(events["verdict"], (FIRED, MISFIRE))
    events["verdict"][hit] = MASKED
    return hit


# ------------------------------------------------------------------------------ driving
def _drive(analysis: RunAnalysis, chunks: Iterable[Chunk], store: Store, run_id: int, *,
           on_step: Callable[[StepOutput, Chunk], None] | None = None,
           commit_every_s: float = COMMIT_EVERY_S) -> None:
    last_commit = time.monotonic()
    for chunk in chunks:
        out = analysis.push(chunk)
        _write(store, run_id, out, analysis.summary)
        if on_step is not None:
            on_step(out, chunk)
        now = time.monotonic()
        if now - last_commit >= commit_every_s:
            store.commit()
            last_commit = now
    out = analysis.finish()
    _write(store, run_id, out, analysis.summary)
    store.commit()


def _write(store: Store, run_id: int, out: StepOutput, summary: RunSummary) -> None:
    if len(out.events):
        store.add_events(run_id, out.events)
    if out.masked_spans:
        store.mask_events(run_id, out.masked_spans)
    for kind in WINDOW_KINDS:  # stored as their blocks complete: memory does not grow
        rows = summary.take_windows(kind)
        if rows:
            store.add_windows(run_id, [{k: v for k, v in r.items() if k != "complete"}
                                       for r in rows], kind=kind)


def _finish(analysis: RunAnalysis, store: Store, run_id: int, *, status: str = "complete"
            ) -> dict:
    s = analysis.summary
    analysis.notes += s.score_layouts(analysis.profile)
    store.add_intervals(run_id, s.interval_rows())
    summary = s.as_dict()
    vib = analysis.vib_summary
    if vib is not None:
        store.add_vibration(run_id, _vibration_rows(vib))
        for name, amp in vib.order_amplitude.items():
            if amp.size:
                for a, axis in enumerate(("x", "y", "z")):
                    store.add_order_map(run_id, sensor=name, rpm_lo=vib.order_rpm_lo,
                                        rpm_hi=vib.order_rpm_hi, orders=vib.orders,
                                        amplitude=amp[:, a, :], axis=axis)
                store.add_order_map(run_id, sensor=name, rpm_lo=vib.order_rpm_lo,
                                    rpm_hi=vib.order_rpm_hi, orders=vib.orders,
                                    amplitude=np.sqrt(np.sum(amp**2, axis=1)), axis="sum")
        summary["vibration_exposure"] = {
            "riding_hours": vib.riding_hours, "a8_m_s2": vib.exposure}
    summary["tooth_errors"] = teeth = _save_tooth_errors(analysis, store, run_id)
    if not analysis.tooth_correction_applied and not summary["layout_check"]["matches_rig"]:
        analysis.notes.insert(0,
            "the layout check ran on an uncorrected wheel: tooth spacing errors bend the speed "
            "profile, so its verdict is doubtful until they are learnt (an overrun fuel cut)")
    if not analysis.tooth_correction_applied and not teeth["kept_for_next_runs"]:
        analysis.notes.insert(0,
            "the wheel's tooth spacing errors are not known yet (no earlier run of this rig learnt "
            "them, and this run had no usable overrun fuel cut): firing intervals are not "
            "corrected for them and may be off by several degrees")
    if teeth["kept_for_next_runs"] and not analysis.tooth_correction_applied:
        analysis.notes.insert(0,
            f"tooth spacing errors of {teeth['learnt_rms_deg']:.3f} deg rms were learnt on this "
            "run's fuel cut and kept for the next runs of this rig; this run is not corrected "
            "(its firing intervals may be off by several degrees): replay it again with --force "
            "to apply them")
    summary["rough_road"] = {"spans": len(analysis.rough_spans),
                             "seconds": float(sum(b - a for a, b in analysis.rough_spans))}
    summary["stream"] = stream_fields(analysis.health, analysis.watch, analysis.live_fields)
    summary["notes"] = ranked_notes(decisive_notes(summary["stream"]),
                                    analysis.notes + analysis.health.notes)
    limit = analysis.rig.limits.misfire_alert_pct
    worst = summary["misfire"]["worst_rev200_pct"]
    summary["misfire"]["alert"] = bool(worst is not None and worst > limit)
    summary["misfire"]["alert_limit_pct"] = limit
    store.finish_run(run_id, summary, status=status)
    return summary


def _save_tooth_errors(analysis: RunAnalysis, store: Store, run_id: int) -> dict:
    """Keep the tooth errors learnt on this run's fuel cuts for the next runs of the rig."""
    learnt = analysis.teeth.result()
    keep = learnt.n_revolutions > 0 and learnt.confidence >= TOOTH_CONFIDENCE_MIN
    if keep:
        store.save_tooth_errors(analysis.rig.name, wheel_key(analysis.rig), learnt.error_deg,
                                run_id=run_id, n_revs=learnt.n_revolutions)
    return {
        "applied_from_earlier_run": analysis.correction_from_store,
        "applied_during_run": analysis.corrected_in_run,
        "replaced_stored": analysis.replaced_stored,
        "learnt_revolutions": int(learnt.n_revolutions),
        "learnt_rms_deg": float(learnt.rms_deg) if learnt.n_revolutions else None,
        "confidence": float(learnt.confidence),
        "kept_for_next_runs": bool(keep),
    }


def _vibration_rows(vib) -> list[dict]:
    rows = []
    for r in vib.rows():
        weighted = r["weighting"] not in ("none", "")
        rows.append({
            "sensor": r["sensor"], "rpm_lo": r["rpm_lo"], "rpm_hi": r["rpm_hi"],
            "axis": r["axis"], "weighting": r["weighting"] if weighted else "none",
            "rms": r["rms"] if weighted else r["rms_unweighted"], "n": int(r["samples"]),
        })
    return rows


def _health_dict(h: StreamHealth) -> dict:
    return {
        "can_frames": h.can_frames, "can_lost_frames": h.can_lost_frames,
        "can_unknown_id": h.can_unknown_id, "can_error_frames": h.can_error_frames,
        "can_remote_frames": h.can_remote_frames, "can_bad_length": h.can_bad_length,
        "can_time_backwards": h.can_time_backwards, "can_time_jumps": h.can_time_jumps,
        "serial_good": dict(h.serial_good), "serial_corrupt": dict(h.serial_corrupt),
        "serial_lost": dict(h.serial_lost), "serial_reconnects": dict(h.serial_reconnects),
    }


def _first_notes(notes: list[str], limit: int = 20) -> list[str]:
    seen: list[str] = []
    for n in notes:
        if n not in seen:
            seen.append(n)
    return seen[:limit] + ([f"... and {len(seen) - limit} more"] if len(seen) > limit else [])


def _begin(rig: Rig, store: Store, sources: list[tuple[Path, str, str]], *, force: bool,
           label, notes, odometer_km) -> tuple[int, np.ndarray | None]:
    hashes = [s[1] for s in sources]
    if sources and not force:
        earlier = store.find_run_by_sources(hashes)
        if earlier is not None:
            err = DuplicateRunError(
                f"these files were analysed before as run {earlier} (force to analyse again)")
            err.run_id = earlier  # type: ignore[attr-defined]
            raise err
    run_id = store.begin_run(rig, label=label, notes=notes, odometer_km=odometer_km,
                             sources=[(str(p), h, k) for p, h, k in sources])
    return run_id, store.load_tooth_errors(rig.name, wheel_key(rig))


def analyse_replay(
    rig: Rig, can_path, accel_paths: dict[str, Path] | None, store: Store, *,
    label: str | None = None, notes: str | None = None, odometer_km: float | None = None,
    pace: float | None = None, force: bool = False,
    progress: Callable[[float], None] | None = None,
) -> RunResult:
    """Analyse recordings into a new run of ``store``.

    Raises :class:`dsp.errors.DuplicateRunError` (with ``run_id``) when the same files were
    analysed before, unless ``force``.
    """
    accel_paths = dict(accel_paths or {})
    sources = [(Path(can_path), sha256_file(can_path), "can")] + [
        (Path(p), sha256_file(p), f"accel:{n}") for n, p in accel_paths.items()]
    run_id, correction = _begin(rig, store, sources, force=force, label=label, notes=notes,
                                odometer_km=odometer_km)
    analysis = RunAnalysis(rig, tooth_correction_deg=correction)
    with warnings.catch_warnings(record=True) as caught, settle_failed_run(store, run_id):
        warnings.simplefilter("always", CrankbeatWarning)
        with stream.replay(rig, can_path, accel_paths, pace=pace,
                           chunk_s=REPLAY_CHUNK_S) as chunks:
            def report(out: StepOutput, chunk: Chunk) -> None:
                if progress is not None:
                    done, total = chunks.progress
                    if total:
                        progress(done / total)
            _drive(analysis, chunks, store, run_id, on_step=report)
        analysis.watch.require_analysable(can_path, census=lambda: log_census(can_path))
    analysis.notes += [str(w.message) for w in caught]
    summary = _finish(analysis, store, run_id)
    if progress is not None:
        progress(1.0)
    return RunResult(run_id, summary)


def analyse_live(
    rig: Rig, bus: CanBus | None, ports: dict[str, str], store: Store, *,
    record_dir: str | Path | None = None, display=None,
    stop_event: threading.Event | None = None, label: str | None = None,
    notes: str | None = None, odometer_km: float | None = None, chunk_s: float = LIVE_CHUNK_S,
) -> RunResult:
    """Analyse a live ride until ``stop_event`` is set (or the bus closes).

    ``display`` is a :class:`logger.live.LiveDisplay` (or None); it is refreshed a few times a
    second from a :class:`logger.live.LiveTally`.
    """
    from crankbeat.logger.live import LiveTally

    run_id, correction = _begin(rig, store, [], force=True, label=label, notes=notes,
                                odometer_km=odometer_km)
    analysis = RunAnalysis(rig, tooth_correction_deg=correction)
    tally = LiveTally(rig.engine, interval_tolerance_deg=rig.limits.interval_tolerance_deg)
    last_draw = [0.0]
    t0 = time.monotonic()

    def on_step(out: StepOutput, chunk: Chunk) -> None:
        tally.push_events(out.events)
        if len(chunk.status):
            vals = chunk.status.values
            tally.set_status(
                rpm=float(vals["engine_speed"][-1]) if "engine_speed" in vals else None,
                throttle=float(vals["throttle"][-1]) if "throttle" in vals else None)
        tally.set_health(chunk.health)
        now = time.monotonic()
        if display is not None and now - last_draw[0] >= 0.25:
            display.update(tally.state(now - t0, recording=str(record_dir) if record_dir else None))
            last_draw[0] = now

    status = "complete"
    try:
        with stream.live(rig, bus, ports, record_dir=record_dir, chunk_s=chunk_s,
                         stop=stop_event) as chunks:
            # every chunk is committed at once: a reader sees each event a chunk after its data
            _drive(analysis, chunks, store, run_id, on_step=on_step, commit_every_s=0.0)
    except KeyboardInterrupt:
        status = "complete"  # the rider stopped the ride: what was analysed is the run
    summary = _finish(analysis, store, run_id, status=status)
    return RunResult(run_id, summary)


__all__ = ["RunAnalysis", "RunResult", "analyse_live", "analyse_replay"]
