"""The tooth-correction policy of a run: learn the wheel's spacing errors on overrun, decide
when (and whether) they correct the rest of the run, and what is kept for later runs.

Earlier runs reach a run only through an explicit prior (:class:`logger.run.output.Priors`):
the caller reads stored tooth errors and passes them in, so a batch of rides given the same
priors gives the same results in any order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.crank import CrankAngles
from crankbeat.dsp.events import FIRED, FUEL_CUT
from crankbeat.dsp.misfire import MisfireSettings
from crankbeat.dsp.toothcal import ToothErrorLearner
from crankbeat.dsp.wheel_learner import RidingWheelLearner
from crankbeat.logger.rig.model import Rig

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


def wheel_key(rig: Rig) -> str:
    """The store's key of a trigger wheel: learnt tooth errors belong to one wheel of one rig."""
    w = rig.wheel
    return f"{w.teeth}-{w.missing}@{w.tdc_offset_deg:g}"


@dataclass(frozen=True)
class CorrectionSwitch:
    """A decision of the policy: apply ``error_deg`` from CAN time ``from_time`` (s) on."""

    error_deg: np.ndarray
    from_time: float


class ToothCorrectionPolicy:
    """Decides, event by event, when the run's own learnt tooth errors take over.

    Parameters
    ----------
    rig : Rig
    settings : MisfireSettings
        The detector's settings (closed throttle and overrun speed define the overrun).
    prior_deg : (real_teeth,) array or None
        Tooth errors given by the caller (learnt on earlier runs of this wheel).
    """

    def __init__(self, rig: Rig, settings: MisfireSettings, prior_deg=None) -> None:
        self.learner = FuelCutLearner(ToothErrorLearner(rig.wheel, rig.engine), settings)
        self.riding = RidingWheelLearner(rig.wheel, rig.engine)  # the wheel from any riding
        self._blocks = AngleBlocks(360.0 * self.riding.check_every)
        self.from_prior = prior_deg is not None
        self.current = None if prior_deg is None else np.asarray(prior_deg, dtype=float)
        self.corrected_in_run = False
        self.replaced_prior = False  # the prior disagreed with this run's own errors
        self.notes: list[str] = []

    @property
    def applied(self) -> bool:
        """Some learnt tooth errors correct (part of) this run: the prior, or its own."""
        return self.from_prior or self.corrected_in_run

    def push(self, crank: CrankAngles, events: np.ndarray, *, final: bool = False
             ) -> CorrectionSwitch | None:
        """Feed a step's edges and events; return a switch when the run's own errors take over."""
        self.learner.push(crank, events, final=final)
        switch = self._from_fuel_cut(final)
        riding = self._from_riding(crank) if not final else None
        return switch if switch is not None else riding

    def _from_riding(self, crank: CrankAngles) -> CorrectionSwitch | None:
        # whole blocks of crank angle: the learner's checks (and a switch) fall on the same
        # edges however the stream is chunked, so live and replay stay equal
        switch = None
        for block in self._blocks.push(crank):
            est = self.riding.push(block)
            if switch is not None or not est.learnt or self.applied:
                continue
            from_time = float(block.t[-1]) + IN_RUN_DELAY_S
            self.corrected_in_run, self.current = True, est.errors.error_deg
            self.notes.append(
                f"tooth spacing errors of {est.errors.rms_deg:.3f} deg rms learnt from riding "
                f"({est.errors.n_revolutions} revolutions) are applied from t={from_time:.1f} s; "
                "the firing intervals of this run are taken from then on")
            switch = CorrectionSwitch(est.errors.error_deg, from_time)
        return switch

    def _from_fuel_cut(self, final: bool) -> CorrectionSwitch | None:
        closed_at = self.learner.take_closed()
        if closed_at is None or self.corrected_in_run or final:
            return None
        learnt = self.learner.result()
        if learnt.confidence < IN_RUN_CONFIDENCE or learnt.n_revolutions < IN_RUN_MIN_REVOLUTIONS:
            return None
        if self.current is not None:
            # a prior is for this rig's wheel; a wheel changed since (or a store shared by
            # several bikes) shows as a disagreement with what this run learns
            off = float(np.sqrt(np.mean((learnt.error_deg - self.current) ** 2)))
            if off <= max(STORED_AGREES_DEG, STORED_AGREES_SHARE * learnt.rms_deg):
                return None
            self.replaced_prior = True
            self.notes.append(
                f"the tooth errors stored for this rig differ from this run's by {off:.3f} deg "
                "rms (another wheel?): this run's own are applied from the time below")
        from_time = closed_at + IN_RUN_DELAY_S
        self.corrected_in_run = True
        self.current = learnt.error_deg
        self.notes.append(
            f"tooth spacing errors of {learnt.rms_deg:.3f} deg rms learnt on the fuel cut ending "
            f"at t={closed_at:.1f} s are applied from t={from_time:.1f} s; the firing intervals "
            "of this run are taken from then on")
        return CorrectionSwitch(learnt.error_deg, from_time)

    def learnt(self) -> LearntTeeth:
        """What the run learnt, and whether it is good enough to keep for later runs: the fuel
        cut's errors when confident, else riding's when learnt."""
        r = self.learner.result()
        est = self.riding.estimate()
        if est.learnt and r.confidence < TOOTH_CONFIDENCE_MIN:
            r = est.errors
        keep = r.n_revolutions > 0 and r.confidence >= TOOTH_CONFIDENCE_MIN
        return LearntTeeth(
            error_deg=np.asarray(r.error_deg, dtype=float) if keep else None,
            n_revolutions=int(r.n_revolutions),
            rms_deg=float(r.rms_deg) if r.n_revolutions else None,
            confidence=float(r.confidence),
            applied_from_prior=self.from_prior, applied_during_run=self.corrected_in_run,
            replaced_prior=self.replaced_prior)


@dataclass(frozen=True)
class LearntTeeth:
    """The tooth errors a run learnt (``error_deg`` None when not confident enough to keep)."""

    error_deg: np.ndarray | None
    n_revolutions: int
    rms_deg: float | None
    confidence: float
    applied_from_prior: bool
    applied_during_run: bool
    replaced_prior: bool

    @property
    def keep(self) -> bool:
        return self.error_deg is not None

    def as_dict(self) -> dict:
        """The summary's ``tooth_errors`` entry."""
        return {
            "applied_from_earlier_run": self.applied_from_prior,
            "applied_during_run": self.applied_during_run,
            "replaced_stored": self.replaced_prior,
            "learnt_revolutions": self.n_revolutions,
            "learnt_rms_deg": self.rms_deg,
            "confidence": self.confidence,
            "kept_for_next_runs": self.keep,
        }


class FuelCutLearner:
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
            self.learner.push(take_edges(edges, 0, cut), np.array(spans, float).reshape(-1, 2))
        self._parts = [take_edges(edges, cut, len(edges))] if cut < len(edges) else []
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


class AngleBlocks:
    """Cuts a stream of crank edges into whole blocks of ``block_deg`` of unwrapped crank angle.

    A block is handed out once an edge of the next block arrives; edges not synced yet (angle
    NaN) ride along with the block they arrive in. The blocks are the same whatever the chunking.
    """

    def __init__(self, block_deg: float) -> None:
        self.block_deg = float(block_deg)
        self._parts: list[CrankAngles] = []
        self._current: float | None = None  # index of the block being filled

    def push(self, crank: CrankAngles) -> list[CrankAngles]:
        if len(crank):
            self._parts.append(crank)
        if not self._parts:
            return []
        edges = CrankAngles.concat(self._parts)
        index = np.floor(edges.angle / self.block_deg)
        out = []
        while True:
            if self._current is None:
                finite = np.flatnonzero(np.isfinite(index))
                if not finite.size:
                    break
                self._current = float(index[finite[0]])
            with np.errstate(invalid="ignore"):
                later = np.flatnonzero(index > self._current)
            if not later.size:
                break
            cut = int(later[0])
            out.append(take_edges(edges, 0, cut))
            edges, index = take_edges(edges, cut, len(edges)), index[cut:]
            self._current = float(index[0])
        self._parts = [edges] if len(edges) else []
        return out


def take_edges(c: CrankAngles, a: int, b: int) -> CrankAngles:
    """Edges ``a:b`` of ``c`` (without its notes)."""
    return CrankAngles(c.t[a:b], c.angle[a:b], c.tooth[a:b], c.valid[a:b], c.period[a:b], [])
