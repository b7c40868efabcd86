"""Whole-run summaries kept in bounded memory, block by block.

The dsp summary functions (:mod:`dsp.analysis`, :mod:`dsp.intervals`) work on event arrays. A
ride of an hour holds several hundred thousand events, so the run is cut into blocks of
:data:`BLOCK_REVOLUTIONS` crank revolutions, aligned on whole blocks from cycle 0 so that the
200- and 1000-revolution windows never straddle two blocks. Each block is summarised when it is
complete and its events are dropped; the blocks' results are merged at the end:

* counts per cylinder and verdict, and the windows: exact;
* firing intervals: the blocks' means weighted by their pair counts, standard errors combined;
* contribution: weighted by the fired events behind it;
* the layout check: from the analyzer's running speed profile of the whole run;
* misfire patterns: summed (a pattern crossing a block edge is classified within each block).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.analysis import (
    cylinder_contribution,
    misfire_counts,
    misfire_patterns,
    window_rates,
)
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import MISFIRE, counted_total
from crankbeat.dsp.intervals import IntervalResult, identify_layout, interval_check
from crankbeat.dsp.layout import firing_sequence, layout_signature
from crankbeat.errors import InputError, LayoutMismatchWarning

#: Crank revolutions per summary block (a multiple of both window lengths).
BLOCK_REVOLUTIONS = 1000
WINDOW_KINDS = {"rev200": 200, "rev1000": 1000}


@dataclass
class _IntervalSum:
    from_cyl: int
    to_cyl: int
    expected: float
    n: int = 0
    mean_sum: float = 0.0  # Σ n_i · mean_i
    var_sum: float = 0.0  # Σ (n_i · stderr_i)²
    spread_sq: float = 0.0  # Σ n_i · spread_i²

    def add(self, r: IntervalResult) -> None:
        if r.n <= 0 or not math.isfinite(r.observed_deg):
            return
        self.n += r.n
        self.mean_sum += r.n * r.observed_deg
        if math.isfinite(r.uncertainty_deg):
            self.var_sum += (r.n * r.uncertainty_deg) ** 2
        if math.isfinite(r.spread_deg):
            self.spread_sq += r.n * r.spread_deg**2

    def row(self, tolerance: float) -> dict:
        observed = self.mean_sum / self.n if self.n else float("nan")
        stderr = math.sqrt(self.var_sum) / self.n if self.n else float("nan")
        flagged = bool(self.n and abs(observed - self.expected) > tolerance)
        return {"from_cyl": self.from_cyl, "to_cyl": self.to_cyl, "expected_deg": self.expected,
                "observed_deg": observed, "stderr_deg": stderr, "n": self.n, "flagged": flagged,
                "spread_deg": math.sqrt(self.spread_sq / self.n) if self.n else float("nan")}


@dataclass
class RunSummary:
    """Accumulates a run's events (final verdicts, in order) into its summary.

    Parameters
    ----------
    engine : Engine
    layout_name : str
        The rig's layout (the name the layout check compares against).
    candidates : dict name -> Engine
        Layouts the firing pattern is scored against.
    tolerance_deg : float
        Firing-interval tolerance.
    """

    engine: Engine
    layout_name: str
    candidates: dict[str, Engine]
    tolerance_deg: float = 3.0
    _block: list[np.ndarray] = field(default_factory=list)
    _block_index: int | None = None
    _counts: dict[str, np.ndarray] = field(default_factory=dict)
    _windows: dict[str, list[dict]] = field(default_factory=lambda: {k: [] for k in WINDOW_KINDS})
    _worst: dict[str, float] = field(default_factory=dict)
    _intervals: dict[int, _IntervalSum] = field(default_factory=dict)
    _contrib: dict[int, list[float]] = field(default_factory=dict)
    _scores: list[tuple[str, float]] = field(default_factory=list)
    _patterns: dict[str, int] = field(default_factory=dict)
    _intervals_from: float | None = None
    _rpm: list[float] = field(default_factory=lambda: [math.inf, -math.inf, 0.0, 0.0])
    _t: list[float] = field(default_factory=lambda: [math.inf, -math.inf])

    def __post_init__(self) -> None:
        self.cycles_per_block = BLOCK_REVOLUTIONS / (self.engine.cycle_deg / 360.0)
        n = self.engine.n_cylinders
        self._counts = {k: np.zeros(n, np.int64) for k in
                        ("fired", "partial", "misfire", "masked", "unusable", "fuel_cut")}

    # -- input ---------------------------------------------------------------------------
    def push(self, events: np.ndarray) -> None:
        """Add events in cycle order; complete blocks are summarised at once."""
        if not len(events):
            return
        block = np.floor(events["cycle"] / self.cycles_per_block).astype(np.int64)
        cuts = np.flatnonzero(np.diff(block)) + 1
        for part, b in zip(np.split(events, cuts), block[np.r_[0, cuts]]):
            if self._block_index is not None and b != self._block_index:
                self._close_block()
            self._block_index = int(b)
            self._block.append(part)

    def _close_block(self) -> None:
        if not self._block:
            return
        ev = np.concatenate(self._block)
        self._block, self._block_index = [], None
        self._summarise(ev)

    def _summarise(self, ev: np.ndarray) -> None:
        n_cyl = self.engine.n_cylinders
        counts = misfire_counts(ev, n_cyl)
        for k in self._counts:
            self._counts[k] += counts[k]
        finite_t = ev["t"][np.isfinite(ev["t"])]
        if finite_t.size:
            self._t[0] = min(self._t[0], float(finite_t.min()))
            self._t[1] = max(self._t[1], float(finite_t.max()))
        rpm = ev["rpm"][np.isfinite(ev["rpm"])]
        if rpm.size:
            self._rpm[0] = min(self._rpm[0], float(rpm.min()))
            self._rpm[1] = max(self._rpm[1], float(rpm.max()))
            self._rpm[2] += float(rpm.sum())
            self._rpm[3] += rpm.size
        for kind, revs in WINDOW_KINDS.items():
            rows = self._window_rows(ev, revs)
            self._windows[kind] += rows
            rates = [r["rate"] for r in rows
                     if r["cylinder"] == 0 and r.get("complete") and math.isfinite(r["rate"])]
            if rates:
                self._worst[kind] = max(self._worst.get(kind, -math.inf), max(rates))
        iv = ev if self._intervals_from is None else ev[ev["t"] >= self._intervals_from]
        for r in interval_check(iv, self.engine, tolerance_deg=self.tolerance_deg):
            acc = self._intervals.setdefault(
                r.from_cylinder, _IntervalSum(r.from_cylinder, r.to_cylinder, r.expected_deg))
            acc.add(r)
        for cyl, c in cylinder_contribution(ev).items():
            if c["n"] > 0 and math.isfinite(c["median"]):
                acc_c = self._contrib.setdefault(cyl, [0.0, 0.0])
                acc_c[0] += c["n"] * c["median"]
                acc_c[1] += c["n"]
        if np.any(ev["verdict"] == MISFIRE):
            for label, count in misfire_patterns(ev)["counts"].items():
                self._patterns[label] = self._patterns.get(label, 0) + int(count)

    def intervals_from(self, t: float) -> None:
        """Take the firing intervals only from events at or after ``t`` (s) from now on.

        Used when the run's own tooth-error correction starts mid-run: intervals before it
        carry the wheel's errors. What was summed before is dropped.
        """
        self._intervals_from = float(t)
        self._intervals = {}

    def _window_rows(self, ev: np.ndarray, revs: int) -> list[dict]:
        windows, per_cyl = window_rates(ev, revolutions=revs, engine=self.engine)
        cycles_per_window = revs / (self.engine.cycle_deg / 360.0)
        rows = []
        for w, pct in zip(windows, per_cyl):
            idx = int(round(w["start_cycle"] / cycles_per_window))
            base = {"idx": idx, "t_start": float(w["t_start"]), "t_end": float(w["t_end"])}
            rows.append({**base, "cylinder": 0, "events": int(w["counted"]),
                         "misfires": int(w["misfires"]), "rate": float(w["rate_pct"]),
                         "complete": bool(w["complete"])})
            for c, rate in enumerate(pct, start=1):
                rows.append({**base, "cylinder": c, "rate": float(rate)})
        return rows

    # -- output --------------------------------------------------------------------------
    def finish(self) -> None:
        self._close_block()

    def take_windows(self, kind: str) -> list[dict]:
        """Window rows summarised since the last call (the caller stores them: flat memory)."""
        rows, self._windows[kind] = self._windows[kind], []
        return rows

    def interval_rows(self) -> list[dict]:
        return [self._intervals[k].row(self.tolerance_deg) for k in sorted(self._intervals,
                key=lambda c: list(self._firing_order()).index(c))]

    def _firing_order(self) -> tuple[int, ...]:
        return tuple(int(c) for c in firing_sequence(self.engine)[0])

    def score_layouts(self, profile) -> list[str]:
        """Score the candidate layouts against the run's crank-speed profile.

        ``profile`` is the analyzer's running :class:`dsp.intervals.SpeedProfile` (events alone
        cannot see a wrong layout: their windows sit where the rig file says). Returns the
        warnings raised, as one-line notes.
        """
        if not self.candidates:
            return []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", LayoutMismatchWarning)
            try:
                self._scores = identify_layout(profile, self.candidates, expected=self.layout_name)
            except InputError as exc:  # no usable crank data at all
                return [f"layout check not possible: {exc}"]
        if self._scores and self._fires_like_rig(self._scores[0][0]):
            return []  # a layout that fires alike (twin-360 and boxer-twin) is no mismatch
        return [str(w.message) for w in caught]

    def _fires_like_rig(self, name: str) -> bool:
        return name == self.layout_name or (
            name in self.candidates
            and layout_signature(self.candidates[name]) == layout_signature(self.engine))

    def layout_scores(self) -> list[tuple[str, float]]:
        return list(self._scores)

    def as_dict(self) -> dict:
        """The run's summary as plain JSON-able values."""
        n = self.engine.n_cylinders
        counted = counted_total(self._counts)  # the one rate definition (COUNTED_VERDICTS)
        per_cyl = []
        for c in range(n):
            rate = 100.0 * self._counts["misfire"][c] / counted[c] if counted[c] else None
            contrib = self._contrib.get(c + 1)
            per_cyl.append({
                "cylinder": c + 1,
                **{k: int(v[c]) for k, v in self._counts.items()},
                "rate_pct": rate,
                "contribution": contrib[0] / contrib[1] if contrib and contrib[1] else None,
            })
        total = int(counted.sum())
        worst = {kind: self._worst.get(kind) for kind in WINDOW_KINDS}
        scores = self.layout_scores()
        best = scores[0][0] if scores else None
        # layouts with the same interval pattern cannot be told apart by it (270° twin, 90° V)
        matches = best is None or best == self.layout_name or (
            layout_signature(self.candidates[best]) == layout_signature(self.engine))
        # layouts firing alike as the best fit: one family ("twin-360 / boxer-twin")
        family = [] if best is None else [
            name for name, _ in scores
            if layout_signature(self.candidates[name]) == layout_signature(self.candidates[best])]
        if best is not None and matches:  # the rig's own name first: it is what was meant
            family = [self.layout_name] + [n for n in family if n != self.layout_name]
        return {
            "t_start": self._t[0] if math.isfinite(self._t[0]) else None,
            # intervals before this CAN time (s) are on the uncorrected wheel: left out
            "intervals_from_t": self._intervals_from,
            "t_end": self._t[1] if math.isfinite(self._t[1]) else None,
            "rpm": {"min": self._rpm[0] if self._rpm[3] else None,
                    "max": self._rpm[1] if self._rpm[3] else None,
                    "mean": self._rpm[2] / self._rpm[3] if self._rpm[3] else None},
            "misfire": {
                "per_cylinder": per_cyl,
                "total": int(self._counts["misfire"].sum()),
                "total_rate_pct": 100.0 * self._counts["misfire"].sum() / total if total else None,
                "worst_rev200_pct": worst["rev200"],
                "worst_rev1000_pct": worst["rev1000"],
                "patterns": dict(sorted(self._patterns.items())),
            },
            "layout_check": {
                "rig_layout": self.layout_name,
                "best": best,
                "same_firing": family,
                "scores": {k: round(v, 4) for k, v in scores},
                "matches_rig": bool(matches),
            },
        }

