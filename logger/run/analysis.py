"""The streaming analysis of one run: chunks in, events, windows, channels and a tail out.

No I/O: :class:`RunAnalysis` neither opens files nor touches a store. Stages, in order per chunk:

1. :class:`dsp.analysis.EventAnalyzer` turns tooth frames and status into final events.
2. The tooth-correction policy (:class:`logger.run.teeth.ToothCorrectionPolicy`) learns the
   wheel on overrun and switches the run's own correction on at a CAN time.
3. :class:`dsp.vibration.VibrationAnalyzer` reports rough-road spans as they close.
4. Rough-road masking (:class:`logger.run.masking.RoughMasking`) holds events until their
   rough-road verdict is known, then hands them to the run's summary
   (:class:`logger.run_summary.RunSummary`, block by block, bounded memory).
5. The status channels are decimated (:class:`logger.run.channels.ChannelDecimator`).

Each :meth:`RunAnalysis.push` returns a :class:`StepOutput` (what a live writer stores at
once); :meth:`RunAnalysis.conclude` (after :meth:`finish`) returns the run's tail
(:class:`logger.run.output.RunTail`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.analysis import EventAnalyzer
from crankbeat.dsp.crank import CrankAngles
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.firing_check import FiringCheck
from crankbeat.dsp.intervals import SpeedProfile
from crankbeat.dsp.misfire import MisfireSettings
from crankbeat.dsp.vibration import SensorSpec, VibrationAnalyzer, VibrationSummary
from crankbeat.logger.chunks import Chunk, StreamHealth
from crankbeat.logger.rig import list_layouts, load_layout
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.run.channels import ChannelDecimator
from crankbeat.logger.run.masking import RoughMasking
from crankbeat.logger.run.teeth import ToothCorrectionPolicy, take_edges
from crankbeat.logger.run_gate import RunWatch
from crankbeat.logger.run_summary import WINDOW_KINDS, RunSummary

#: Fuel cut is looked for above this multiple of the rig's idle speed.
FUEL_CUT_OVER_IDLE = 1.25


def layout_candidates(engine: Engine) -> dict[str, Engine]:
    """Shipped layouts with the engine's cylinder count and stroke cycle, plus the engine itself.

    The stroke cycle is not in question (the rig's wheel, cam and ECU say it); a two-stroke twin
    fires like a four-stroke twin-180 twice over and only adds chances of a false warning.
    """
    out = {}
    for name in list_layouts():
        eng = load_layout(name)
        if eng.n_cylinders == engine.n_cylinders and eng.stroke_cycle == engine.stroke_cycle:
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
    """What one chunk produced.

    Attributes
    ----------
    events : ndarray of EVENT_DTYPE
        Events now final (not yet masked: see ``masked_spans``).
    masked_spans : list of (t0, t1)
        Rough-road spans (s) that closed in this step: events inside are "masked".
    windows : dict kind -> list of dict
        Misfire-rate windows whose blocks completed.
    channels : dict name -> (t, value)
        Status channel rows now final.
    notes : list of str
    """

    events: np.ndarray
    masked_spans: list[tuple[float, float]] = field(default_factory=list)
    windows: dict[str, list[dict]] = field(default_factory=dict)
    channels: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


class RunAnalysis:
    """The streaming analysis of one run (no I/O: chunks in, events and summaries out).

    Parameters
    ----------
    rig : Rig
    tooth_correction_deg : (real_teeth,) array or None
        The prior: tooth errors learnt on earlier runs of the same wheel, given by the caller.
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
        self.teeth = ToothCorrectionPolicy(rig, self.events.settings, tooth_correction_deg)
        self.masking = RoughMasking(self.vibration, [s.name for s in specs], self.summary.push)
        self.channels = ChannelDecimator()
        self.watch = RunWatch(rig)  # crank frames seen (the gate), accelerometer breaks
        self.live_fields: dict = {}  # live faults (link, store, recording), stored with the run
        self.t_first: float | None = None  # first crank edge of the run, CAN time (s)
        # the layout check's speed profile: the analyzer's own, or one restarted where a
        # tooth-error correction learnt mid-run takes effect (uncorrected teeth bend the profile)
        self.profile = self.events.profile
        self._profile_from: float | None = None
        # firing intervals and the layout verdict from the run's averaged crank cycle
        self.firing = FiringCheck(engine, rig.wheel.pitch_deg, layout_candidates(engine),
                                  rig.limits.interval_tolerance_deg)

    @property
    def tooth_correction_applied(self) -> bool:
        """Some learnt tooth errors correct (part of) this run: the prior, or its own."""
        return self.teeth.applied

    @property
    def rough_spans(self) -> list[tuple[float, float]]:
        return self.masking.rough_spans

    # -- per chunk -----------------------------------------------------------------------
    def push(self, chunk: Chunk) -> StepOutput:
        te = chunk.teeth
        status_t = chunk.status.t if len(chunk.status) else None
        throttle = chunk.status.values.get("throttle") if len(chunk.status) else None
        step = self.events.push(te.frame_time, te.periods, te.cam, te.lost_before,
                                status_t=status_t, throttle=throttle)
        self.health = chunk.health
        self._note_start(step.crank)
        switch = self.teeth.push(step.crank, step.events)
        if switch is not None:
            self._apply_correction(switch.error_deg, switch.from_time)
        self._add_to_profile(step.crank)
        self.firing.push(step.crank)
        self.channels.push(chunk.status)
        new_spans = []
        if self.vibration is not None:
            accel = {n: (b.t, b.xyz, b.gap_before) for n, b in chunk.accel.items() if len(b)}
            for name in accel:
                self.masking.saw_accel(name)
            crank = step.crank
            vstep = self.vibration.push(accel, (crank.t, crank.angle, crank.valid))
            self.masking.accounted(vstep.t_done)
            for spans in vstep.rough_spans.values():
                new_spans += spans
        out = self._output(step, new_spans, end_time=chunk.end_time)
        self.watch.push(chunk, step.events)
        return out

    def finish(self) -> StepOutput:
        step = self.events.finish()
        self._note_start(step.crank)
        self.teeth.push(step.crank, step.events, final=True)
        self._add_to_profile(step.crank)
        self.firing.push(step.crank)
        self.channels.finish()
        new_spans = []
        if self.vibration is not None:
            crank = step.crank
            if len(crank.t):
                self.vibration.push({}, (crank.t, crank.angle, crank.valid))
            self.vib_summary = self.vibration.finish()
            new_spans = self.vib_summary.rough_spans_all
        out = self._output(step, new_spans, end_time=np.inf, final=True)
        self.watch.finish(step.events)
        self.summary.finish()
        out.windows = self._take_windows()
        return out

    def conclude(self):
        """The run's tail after :meth:`finish`: intervals, vibration, teeth, summary, notes."""
        from crankbeat.logger.run.output import conclude

        return conclude(self)

    def _output(self, step, new_spans, *, end_time: float, final: bool = False) -> StepOutput:
        spans = self.masking.push(step.events, new_spans, end_time=end_time, final=final)
        out = StepOutput(step.events, masked_spans=spans, windows=self._take_windows(),
                         channels=self.channels.take(), notes=list(step.notes))
        self.notes += out.notes + self.teeth.notes
        self.teeth.notes = []
        return out

    def _take_windows(self) -> dict[str, list[dict]]:
        # taken as their blocks complete: memory does not grow with the ride
        out = {}
        for kind in WINDOW_KINDS:
            rows = self.summary.take_windows(kind)
            if rows:
                out[kind] = [{k: v for k, v in r.items() if k != "complete"} for r in rows]
        return out

    def _note_start(self, crank: CrankAngles) -> None:
        if self.t_first is None and len(crank):
            self.t_first = float(crank.t[0])

    # -- tooth correction ----------------------------------------------------------------
    def _apply_correction(self, error_deg: np.ndarray, from_time: float) -> None:
        self.events.schedule_tooth_correction(error_deg, from_time)
        self.summary.intervals_from(from_time)
        old = self.events.profile
        self.profile = SpeedProfile(old.cycle_deg, old.bin_deg)
        self._profile_from = from_time
        self.firing.restart(from_time)

    def _add_to_profile(self, crank: CrankAngles) -> None:
        if self._profile_from is None or not len(crank):
            return  # the analyzer keeps its own profile up to date
        late = int(np.searchsorted(crank.t, self._profile_from, side="left"))
        if late < len(crank):
            self.profile.add(take_edges(crank, late, len(crank)))
