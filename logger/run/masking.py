"""Rough-road masking: events inside a rough-road span are not judged (verdict "masked").

Spans are reported when they close, after their events were handed out; :class:`RoughMasking`
holds each event until its rough-road verdict is known (or :data:`MASK_WAIT_LIMIT_S` has passed),
so that the run's summaries count it once, masked or not. A store that received the events at
once masks them later by time span (:meth:`logger.store.Store.mask_events`); both give the
same rows (:func:`mask_events` here is the in-memory twin of that update).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from crankbeat.dsp.events import COUNTED_VERDICTS, MASKED
from crankbeat.dsp.vibration import VibrationAnalyzer, merge_spans

#: How long events wait for the rough-road verdict before they are summarised without it, s
#: of CAN time (a board that fell silent must not hold the summaries back for ever).
MASK_WAIT_LIMIT_S = 5.0
#: Longest rough-road span whose events are held back for the summaries, s (the store's events
#: are masked however long the span lasts).
OPEN_SPAN_LIMIT_S = 300.0


def mask_events(events: np.ndarray, spans: list[tuple[float, float]]) -> np.ndarray:
    """Mark judged events (fired, partial, misfire) inside a rough-road span MASKED (in place);
    return the mask."""
    hit = np.zeros(len(events), bool)
    if not spans or not len(events):
        return hit
    t = events["t"]
    for a, b in spans:
        hit |= (t >= a) & (t <= b)
    hit &= np.isin(events["verdict"], COUNTED_VERDICTS)
    events["verdict"][hit] = MASKED
    return hit


class RoughMasking:
    """Holds events until their rough-road verdict is known; hands them on masked.

    Parameters
    ----------
    vibration : VibrationAnalyzer or None
        The run's vibration stage (None: no accelerometer, events pass at once).
    sensors : list of str
        Names of the boards.
    on_ready : callable(events)
        Receives the events whose verdict is settled, in order (the run's summaries).
    """

    def __init__(self, vibration: VibrationAnalyzer | None, sensors: list[str],
                 on_ready: Callable[[np.ndarray], None]) -> None:
        self.vibration = vibration
        self.on_ready = on_ready
        self.rough_spans: list[tuple[float, float]] = []  # every span of the run, merged
        self._held: list[np.ndarray] = []
        self._spans: list[tuple[float, float]] = []  # closed spans that may still touch held events
        self._accel_done = {n: -np.inf for n in sensors}  # accelerometer accounted up to, s
        self._accel_seen = {n: False for n in sensors}
        self._last_event_t = -np.inf

    def saw_accel(self, name: str) -> None:
        self._accel_seen[name] = True

    def accounted(self, t_done: dict[str, float]) -> None:
        for name, t in t_done.items():
            self._accel_done[name] = max(self._accel_done[name], t)

    def push(self, events: np.ndarray, new_spans, *, end_time: float, final: bool = False
             ) -> list[tuple[float, float]]:
        """Take a step's events and newly closed spans; return the spans (merged) to mask."""
        merged: list[tuple[float, float]] = []
        if new_spans:
            merged = merge_spans(list(new_spans))
            self._spans = merge_spans(self._spans + merged)
            self.rough_spans = merge_spans(self.rough_spans + merged)
        if len(events):
            self._held.append(events.copy())
            self._last_event_t = float(np.nanmax(np.r_[events["t"], self._last_event_t]))
        if not self._held:
            return merged
        held = np.concatenate(self._held)
        mask_events(held, self._spans)
        if final or self.vibration is None:
            ready = len(held)
        else:
            ready = int(np.searchsorted(held["t"], self._decided_until(end_time), side="right"))
        self.on_ready(held[:ready])
        self._held = [held[ready:]] if ready < len(held) else []
        oldest = held["t"][ready] if ready < len(held) else self._last_event_t
        self._spans = [s for s in self._spans if s[1] >= oldest]
        return merged

    def _decided_until(self, end_time: float) -> float:
        """Events up to this time know their rough-road verdict (spans report as they close)."""
        lag = self.vibration.rough_verdict_lag_s()
        seen = [t for n, t in self._accel_done.items() if self._accel_seen[n]]
        decided = (min(seen) - lag) if seen else -np.inf
        # a silent board (unplugged, or none recorded) must not hold the summaries for ever
        decided = max(decided, end_time - MASK_WAIT_LIMIT_S)
        open_since = self.vibration.rough_open_since()
        if open_since is not None:  # an open span already holds its start
            decided = min(decided, max(open_since, end_time - OPEN_SPAN_LIMIT_S))
        return decided
