"""Scoring detected misfires against ground truth: the one scorer of tests and scripts.

Events are matched per cylinder to the nearest truth event in time, within ``tolerance_s``
(default: a quarter of the time from each truth event to its nearest neighbour of any cylinder,
i.e. a fraction of the shortest firing interval at that moment). Counted are the matched events
that neither side excludes: the truth's fuel-cut events and the detector's MASKED, FUEL_CUT and
UNUSABLE verdicts are left out and counted apart.

* detection rate = detected misfires / true misfires (among counted events)
* false-alarm rate = misfires declared on truly fired events / truly fired events
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.events import FUEL_CUT, MASKED, MISFIRE, UNUSABLE, VERDICT_NAMES
from crankbeat.errors import InputError

_EXCLUDING = (MASKED, FUEL_CUT, UNUSABLE)
_NAME_TO_CODE = {v: k for k, v in VERDICT_NAMES.items()}


@dataclass
class Score:
    """Result of :func:`score_misfire` (counts are of events; rates are fractions 0..1)."""

    true_misfires: int
    detected_misfires: int  # true misfires the detector flagged
    true_fired: int
    false_alarms: int  # truly fired events flagged as misfire
    detection_rate: float  # NaN when there is no true misfire
    false_alarm_rate: float  # NaN when there is no fired event
    unmatched_detected: int  # detected events with no truth event within the tolerance
    unmatched_truth: int  # truth events with no detected event within the tolerance
    excluded: int  # matched events left out (fuel cut, masked, unusable)
    excluded_by_verdict: dict[str, int] = field(default_factory=dict)
    per_cylinder: dict[int, dict[str, int]] = field(default_factory=dict)

    def summary(self) -> str:
        """One line for a report or a script."""
        return (
            f"detection {_pct(self.detection_rate)} "
            f"({self.detected_misfires}/{self.true_misfires}), "
            f"false alarms {_pct(self.false_alarm_rate)} ({self.false_alarms}/{self.true_fired}), "
            f"unmatched {self.unmatched_detected} detected / {self.unmatched_truth} truth, "
            f"excluded {self.excluded}"
        )


def _pct(x: float) -> str:
    return "n/a" if not np.isfinite(x) else f"{100 * x:.2f} %"


def _column(data, name: str, alt: int | None) -> np.ndarray | None:
    if isinstance(data, np.ndarray) and data.dtype.names:
        return np.asarray(data[name]) if name in data.dtype.names else None
    if isinstance(data, dict):
        return np.asarray(data[name]) if name in data else None
    if alt is not None and alt < len(data) and data[alt] is not None:
        return np.asarray(data[alt])
    return None


def _verdict_codes(v: np.ndarray) -> np.ndarray:
    if v.dtype.kind in "iub":
        return v.astype(np.int64)
    out = np.empty(v.size, dtype=np.int64)
    for i, name in enumerate(v.astype(str)):
        key = name.strip().lower()
        if key in _NAME_TO_CODE:
            out[i] = _NAME_TO_CODE[key]
        else:
            try:
                out[i] = int(key)
            except ValueError as exc:
                raise InputError(f"unknown verdict {name!r} at row {i}") from exc
    return out


def score_misfire(detected, truth, *, tolerance_s: float | None = None) -> Score:
    """Match detected events to the truth and count hits, misses and false alarms.

    Parameters
    ----------
    detected : tuple ``(t, cylinder, misfire[, verdict])``, dict or structured array
        Detected events: time (s), cylinder (1-based), misfire flag (0/1, or None to take it from
        the verdict) and optionally the verdict (code or name) for exclusions. A
        :data:`dsp.events.EVENT_DTYPE` array works too
        (its ``verdict`` gives the misfire flag).
    truth : tuple ``(t, cylinder, fired[, fuel_cut])``, dict or structured array
        Ground truth per firing event, as the simulator's truth file.
    tolerance_s : float or None, keyword-only
        Largest time difference of a match, s; default a quarter of each truth event's time to
        its nearest neighbouring truth event.

    Returns
    -------
    Score
    """
    dt_ = _column(detected, "t", 0)
    dc = _column(detected, "cylinder", 1)
    dv = _column(detected, "verdict", 3)
    dm = _column(detected, "misfire", 2)
    if dt_ is None or dc is None:
        raise InputError("detected events need t and cylinder")
    dt_ = dt_.astype(float)
    dc = dc.astype(np.int64)
    codes = _verdict_codes(dv) if dv is not None else None
    if dm is None:
        if codes is None:
            raise InputError("detected events need a misfire flag or a verdict")
        dm = codes == MISFIRE
    dm = dm.astype(bool)
    tt = _column(truth, "t", 0)
    tc = _column(truth, "cylinder", 1)
    tf = _column(truth, "fired", 2)
    tfc = _column(truth, "fuel_cut", 3)
    if tt is None or tc is None or tf is None:
        raise InputError("truth needs t, cylinder and fired")
    tt, tc, tf = tt.astype(float), tc.astype(np.int64), tf.astype(bool)
    tfc = np.zeros(tt.size, bool) if tfc is None else tfc.astype(bool)
    for label, arrs in (("detected", (dt_, dc, dm)), ("truth", (tt, tc, tf, tfc))):
        if len({a.shape for a in arrs}) != 1:
            raise InputError(f"{label} columns differ in length: {[a.size for a in arrs]}")

    if tolerance_s is None:
        order = np.argsort(tt, kind="stable")
        ts = tt[order]
        gaps = np.diff(ts)
        near = np.full(ts.size, np.inf)
        if ts.size > 1:
            near[1:] = gaps
            near[:-1] = np.minimum(near[:-1], gaps)
        tol = np.empty(tt.size)
        tol[order] = 0.25 * near
    else:
        if not tolerance_s > 0:
            raise InputError(f"tolerance_s must be > 0, got {tolerance_s!r}")
        tol = np.full(tt.size, float(tolerance_s))

    match = np.full(tt.size, -1, dtype=np.int64)  # index into detected for each truth event
    for cyl in np.unique(np.concatenate((tc, dc))):
        ti = np.flatnonzero(tc == cyl)
        di = np.flatnonzero(dc == cyl)
        if not ti.size or not di.size:
            continue
        o = np.argsort(dt_[di], kind="stable")
        di = di[o]
        dts = dt_[di]
        pos = np.searchsorted(dts, tt[ti])
        lo = np.clip(pos - 1, 0, dts.size - 1)
        hi = np.clip(pos, 0, dts.size - 1)
        pick = np.where(np.abs(dts[lo] - tt[ti]) <= np.abs(dts[hi] - tt[ti]), lo, hi)
        close = np.abs(dts[pick] - tt[ti]) <= tol[ti]
        cand = np.where(close, di[pick], -1)
        # one detected event serves one truth event: the nearest keeps it
        if np.any(cand >= 0):
            dist = np.abs(dt_[np.maximum(cand, 0)] - tt[ti])
            o2 = np.lexsort((dist, cand))
            c2 = cand[o2]
            dup = np.zeros(c2.size, bool)
            dup[1:] = (c2[1:] == c2[:-1]) & (c2[1:] >= 0)
            cand[o2[dup]] = -1
        match[ti] = cand

    matched = match >= 0
    used = np.zeros(dt_.size, bool)
    used[match[matched]] = True
    excl = tfc.copy()
    by_verdict: dict[str, int] = {"truth_fuel_cut": int((tfc & matched).sum())}
    if codes is not None:
        mv = np.full(tt.size, -1)
        mv[matched] = codes[match[matched]]
        for code in _EXCLUDING:
            hit = matched & (mv == code)
            by_verdict[VERDICT_NAMES[code]] = int(hit.sum())
            excl |= hit
    counted = matched & ~excl
    flagged = np.zeros(tt.size, bool)
    flagged[matched] = dm[match[matched]]
    true_mis = counted & ~tf
    true_fir = counted & tf
    hits = true_mis & flagged
    fa = true_fir & flagged
    per_cyl = {}
    for cyl in np.unique(tc):
        s = tc == cyl
        per_cyl[int(cyl)] = {
            "true_misfires": int((true_mis & s).sum()),
            "detected": int((hits & s).sum()),
            "true_fired": int((true_fir & s).sum()),
            "false_alarms": int((fa & s).sum()),
        }
    n_mis, n_fir = int(true_mis.sum()), int(true_fir.sum())
    return Score(
        true_misfires=n_mis,
        detected_misfires=int(hits.sum()),
        true_fired=n_fir,
        false_alarms=int(fa.sum()),
        detection_rate=hits.sum() / n_mis if n_mis else float("nan"),
        false_alarm_rate=fa.sum() / n_fir if n_fir else float("nan"),
        unmatched_detected=int((~used).sum()),
        unmatched_truth=int((~matched).sum()),
        excluded=int((matched & excl).sum()),
        excluded_by_verdict=by_verdict,
        per_cylinder=per_cyl,
    )
