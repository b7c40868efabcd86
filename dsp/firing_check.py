"""The run's firing-interval and layout verdicts, with explicit state (streaming).

Policy
------
* The layout verdict comes from the low crank orders of the averaged cycle
  (:func:`dsp.firing_profile.layout_verdict`), which the wheel's tooth-spacing errors hardly
  reach: it is given whether or not the wheel's errors are known. When the rig's layout does not
  fit, the caller withholds misfire alerts (the events' windows sit where the rig file says).
* Firing intervals are judged only on a wheel whose errors are known (learnt on an earlier run or
  on this one): 0.1 deg of tooth error moves a pulse by several degrees (measured: 265-283 deg for
  a true 270 on 0.15 deg rms wheels). On a wheel not learnt the intervals are "not judged".
* When a correction starts mid-run the profile restarts there, so only corrected cycles count.
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.firing_profile import (
    CycleProfile,
    LayoutVerdict,
    layout_verdict,
    profile_intervals,
)
from crankbeat.errors import InputError

__all__ = ["FiringCheck", "NOT_JUDGED_NOTE"]

NOT_JUDGED_NOTE = ("firing intervals not judged (wheel not learnt): the wheel's tooth spacing "
                   "errors are not known yet, and they move the firing pulses by degrees")


class FiringCheck:
    """Accumulates the cycle profile; gives the interval rows and the layout verdict.

    Parameters
    ----------
    engine : Engine
        The rig's layout.
    pitch_deg : float
        The wheel's tooth pitch.
    candidates : dict name -> Engine
        Layouts to score (the rig's included under ``engine.name``).
    tolerance_deg : float
        Interval tolerance.
    """

    def __init__(self, engine: Engine, pitch_deg: float, candidates: dict[str, Engine],
                 tolerance_deg: float = 3.0) -> None:
        if not tolerance_deg > 0:
            raise InputError(f"tolerance_deg must be > 0, got {tolerance_deg!r}")
        self.engine, self.pitch = engine, float(pitch_deg)
        self.candidates = dict(candidates)
        self.candidates.setdefault(engine.name, engine)
        self.tolerance = float(tolerance_deg)
        self.profile = CycleProfile(engine.cycle_deg, pitch_deg)
        self.from_time: float | None = None

    def push(self, crank) -> None:
        """Add a push's crank edges (those before a pending restart time are left out)."""
        if self.from_time is not None and len(crank.t):
            late = int(np.searchsorted(np.asarray(crank.t), self.from_time, side="left"))
            if late >= len(crank.t):
                return
            if late:
                crank = _Edges(crank.t[late:], crank.angle[late:], crank.valid[late:])
        self.profile.push(crank)

    def restart(self, from_time: float) -> None:
        """Drop what was averaged; count edges from ``from_time`` (s) on (a correction starts)."""
        self.profile = CycleProfile(self.engine.cycle_deg, self.pitch)
        self.from_time = float(from_time)

    def layout(self) -> LayoutVerdict | None:
        """The layout verdict, None when there is too little synced data."""
        try:
            return layout_verdict(self.profile, self.candidates, self.engine.name)
        except InputError:
            return None

    def cycles_averaged(self) -> int:
        """Engine cycles in the averaged profile (its tooth intervals over a cycle's worth)."""
        return int(round(self.profile.edges * self.pitch / self.engine.cycle_deg))

    def interval_rows(self, wheel_known: bool) -> tuple[list[dict], list[str]]:
        """Rows for the store's interval table and notes; observed None when not judged."""
        try:
            grid, tq = self.profile.torque(self.engine)
        except InputError as exc:
            return [], [f"firing intervals not judged: {exc}"]
        rows = []
        for r in profile_intervals(grid, tq, self.engine):
            judged = bool(wheel_known)
            off = r.observed_deg - r.expected_deg
            rows.append({"from_cyl": r.from_cylinder, "to_cyl": r.to_cylinder,
                         "expected_deg": r.expected_deg,
                         "observed_deg": r.observed_deg if judged else None,
                         "stderr_deg": None, "n": self.cycles_averaged(),
                         "flagged": bool(judged and abs(off) > self.tolerance)})
        return rows, ([] if wheel_known else [NOT_JUDGED_NOTE])


class _Edges:
    def __init__(self, t, angle, valid) -> None:
        self.t, self.angle, self.valid = t, angle, valid
