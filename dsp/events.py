"""The per-firing-event record that the dsp pipeline emits and the store keeps.

One row per firing event the crank reconstruction saw, fired or not. Arrays of
:data:`EVENT_DTYPE` are the currency between the misfire stage, the store and the reports.
"""

from __future__ import annotations

import numpy as np

#: Verdict codes of a firing event.
FIRED = 0  # combustion seen
MISFIRE = 1  # no (or too little) combustion
MASKED = 2  # rough road or another disturbance: neither counted as fired nor as misfire
UNUSABLE = 3  # crank angle not trustworthy (sync lost, lost frames, saturated periods)
FUEL_CUT = 4  # overrun with the throttle closed: no combustion expected, not a misfire
PARTIAL = 5  # combustion, but clearly less than the cylinder's own (a partial burn)

#: Verdicts that count in a misfire rate's denominator: the events judged for combustion (a
#: partial burn is a firing event that is no misfire). Masked, fuel-cut and unusable events are
#: not judged and count nowhere. Every rate of crankbeat (run summary, windows, trend, live
#: screen) takes this one definition.
COUNTED_VERDICTS = (FIRED, PARTIAL, MISFIRE)

def counted_total(counts_by_name):
    """Sum of the per-verdict counts (keyed by :data:`VERDICT_NAMES`) of the counted verdicts."""
    return sum(counts_by_name[VERDICT_NAMES[v]] for v in COUNTED_VERDICTS)


VERDICT_NAMES = {
    FIRED: "fired",
    MISFIRE: "misfire",
    MASKED: "masked",
    UNUSABLE: "unusable",
    FUEL_CUT: "fuel_cut",
    PARTIAL: "partial",
}

EVENT_DTYPE = np.dtype(
    [
        ("t", "f8"),  # s, time of this cylinder's firing TDC on the CAN log's time base
        ("cycle", "i8"),  # working-cycle index since the start of the run
        ("cylinder", "i2"),  # 1-based
        ("rpm", "f8"),  # mean crank speed over the event's window, rpm
        ("throttle", "f8"),  # % (NaN when the rig has no throttle signal)
        ("metric", "f8"),  # robust z-score of the missing work; larger = weaker combustion
        ("threshold", "f8"),  # decision threshold applied to ``metric`` (robust sigma)
        ("verdict", "i1"),  # FIRED, MISFIRE, MASKED, UNUSABLE, FUEL_CUT or PARTIAL
        ("confidence", "f4"),  # 0..1, how clear the verdict is
        ("interval_deg", "f8"),  # observed crank angle since the previous firing (NaN: none)
        ("expected_interval_deg", "f8"),  # what the layout promises for that interval
        ("contribution", "f8"),  # relative work of the expansion window (1.0 = engine mean)
    ]
)


def empty_events(n: int = 0) -> np.ndarray:
    """An event array of length ``n`` with NaN floats and FIRED verdicts."""
    out = np.zeros(n, dtype=EVENT_DTYPE)
    for name in EVENT_DTYPE.names or ():
        if EVENT_DTYPE[name].kind == "f":
            out[name] = np.nan
    return out


#: Why an event got its verdict, where the verdict alone does not say (``cause`` of
#: :data:`EVENT_DETAIL_DTYPE`).
CAUSE_NONE = 0
CAUSE_CRANK = 1  # the crank data did not allow a metric (sync lost, lost frames, run ends)
CAUSE_WARMUP = 2  # the cylinder's own statistics were not in yet (first cycles of the run)
CAUSE_DEAD = 3  # the cylinder's level collapsed against the others: no combustion for a while
CAUSE_IMPLAUSIBLE = 4  # the cylinder's metric failed the self-check (see the run's notes)

CAUSE_NAMES = {
    CAUSE_NONE: "",
    CAUSE_CRANK: "crank data",
    CAUSE_WARMUP: "warm-up",
    CAUSE_DEAD: "dead cylinder",
    CAUSE_IMPLAUSIBLE: "implausible metric",
}

#: Per-event detail beside :data:`EVENT_DTYPE` (same length and order; not kept by the store).
EVENT_DETAIL_DTYPE = np.dtype(
    [
        ("depth", "f8"),  # missing work as a share of a complete misfire; NaN: not calibrated
        ("cause", "u1"),  # CAUSE_* code
    ]
)


def empty_detail(n: int = 0) -> np.ndarray:
    """A detail array of length ``n``: depth NaN (not calibrated), no cause."""
    out = np.zeros(n, dtype=EVENT_DETAIL_DTYPE)
    out["depth"] = np.nan
    return out
