"""Observed firing intervals and layout identification from the combustion's own signature.

Each fired event's gas work over a span around its TDC has a centre (``rise_deg`` of
:mod:`dsp.fluctuation`): a retarded cylinder's is later. The observed interval between two
consecutive firings is the difference of their centres, ``(θ_k + rise_k) − (θ_{k−1} +
rise_{k−1})``; :func:`interval_check` averages it per pair of cylinders with its uncertainty and
flags pairs that differ from the layout (:func:`dsp.layout.firing_intervals`) by more than the
tolerance.

:func:`identify_layout` scores candidate layouts against the pattern of speed rises over the
cycle: the cycle-averaged torque profile ``d(½J(θ)ω²)/dθ`` (with each candidate's own ``J(θ)``)
is correlated with the same profile's cylinder-1 pulse repeated at the candidate's firing angles.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import FIRED
from crankbeat.dsp.fluctuation import event_fluctuation
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.dsp.layout import firing_angles, firing_sequence
from crankbeat.errors import InputError, LayoutMismatchWarning


@dataclass(frozen=True)
class IntervalResult:
    """Observed interval from one cylinder's firing to the next one's (degrees)."""

    from_cylinder: int
    to_cylinder: int
    expected_deg: float
    observed_deg: float  # NaN when no pair was seen
    uncertainty_deg: float  # standard error of ``observed_deg`` (1 sigma)
    spread_deg: float  # robust standard deviation of the single intervals
    n: int  # pairs averaged
    flagged: bool  # |observed - expected| > tolerance


def _robust_mean(x: np.ndarray) -> tuple[float, float, float]:
    """Mean after dropping values beyond 4 robust sigmas; its standard error; the sigma."""
    x = x[np.isfinite(x)]
    if x.size == 0:
        return np.nan, np.nan, np.nan
    med = float(np.median(x))
    sig = 1.4826 * float(np.median(np.abs(x - med)))
    keep = x if sig == 0 else x[np.abs(x - med) <= 4 * sig]
    mean = float(np.mean(keep))
    sd = float(np.std(keep, ddof=1)) if keep.size > 1 else np.nan
    return mean, sd / np.sqrt(keep.size) if keep.size > 1 else np.nan, sd


def interval_check(
    data,
    engine: Engine,
    *,
    tolerance_deg: float = 3.0,
    pitch_deg: float | None = None,
    rpm_range: tuple[float, float] | None = None,
) -> list[IntervalResult]:
    """Observed vs expected interval for each pair of consecutive firings.

    Parameters
    ----------
    data : ndarray of :data:`dsp.events.EVENT_DTYPE`, or a CrankAngles-like object
        Events (their ``interval_deg`` of fired pairs is used), or the crank angles of a run (the
        per-event centres are computed here; events whose work is below half the cylinder's
        median count as not fired).
    engine : Engine
    tolerance_deg : float, keyword-only
        Largest accepted deviation, degrees.
    pitch_deg : float, keyword-only
        Tooth pitch; needed with crank angles.
    rpm_range : (lo, hi) rpm, keyword-only
        Use only events in this speed range.

    Returns
    -------
    list of IntervalResult, in firing order starting with the interval that ends at cylinder 1's
    successor (i.e. one per cylinder, ``from_cylinder`` in firing order).
    """
    if not tolerance_deg > 0:
        raise InputError(f"tolerance_deg must be > 0, got {tolerance_deg!r}")
    cyls, angles = firing_sequence(engine)
    iv = np.diff(np.concatenate((angles, [angles[0] + engine.cycle_deg])))
    nxt = np.roll(cyls, -1)
    if isinstance(data, np.ndarray) and data.dtype.names and "interval_deg" in data.dtype.names:
        to_cyl = data["cylinder"].astype(int)
        obs = np.where(data["verdict"] == FIRED, data["interval_deg"], np.nan)
        rpm = data["rpm"]
    else:
        if pitch_deg is None:
            raise InputError("interval_check on crank angles needs pitch_deg")
        raw = event_fluctuation(
            data.t, data.angle, data.valid, data.period, engine, pitch_deg=pitch_deg
        )
        to_cyl = raw["cylinder"].astype(int)
        fired = np.zeros(raw.size, bool)
        for c in np.unique(to_cyl):
            s = (to_cyl == c) & raw["usable"]
            if s.any():
                fired[s] = raw["work"][s] > 0.5 * np.median(raw["work"][s])
        at = np.where(fired, raw["theta"] + raw["rise_deg"], np.nan)
        obs = np.full(raw.size, np.nan)
        consecutive = np.diff(raw["index"]) == 1
        obs[1:] = np.where(consecutive, at[1:] - at[:-1], np.nan)
        rpm = raw["rpm"]
    if rpm_range is not None:
        obs = np.where((rpm >= rpm_range[0]) & (rpm <= rpm_range[1]), obs, np.nan)
    out = []
    for k, c_from in enumerate(cyls):
        c_to = int(nxt[k])
        mean, se, sd = _robust_mean(obs[to_cyl == c_to])
        n = int(np.isfinite(obs[to_cyl == c_to]).sum())
        flagged = bool(np.isfinite(mean) and abs(mean - iv[k]) > tolerance_deg)
        out.append(IntervalResult(int(c_from), c_to, float(iv[k]), mean, se, sd, n, flagged))
    return out


# --- layout identification --------------------------------------------------------------------


class SpeedProfile:
    """Running cycle profile of the crank speed (for :func:`identify_layout`), bounded memory.

    ``add(crank)`` takes the edges of a push (``t``, ``angle``, ``valid``); each tooth interval's
    ω² is divided by the mean ω² of its working cycle within the push (so that speed changes over
    the run weigh each cycle alike) and summed into angle bins over the cycle.
    """

    def __init__(self, cycle_deg: float = 720.0, bin_deg: float = 6.0):
        if not 0 < bin_deg <= cycle_deg / 8:
            raise InputError(f"bin_deg must be in (0, {cycle_deg / 8}], got {bin_deg!r}")
        self.cycle_deg, self.bin_deg = float(cycle_deg), float(bin_deg)
        self.nb = int(round(cycle_deg / bin_deg))
        self.sums = np.zeros(self.nb)
        self.counts = np.zeros(self.nb, dtype=np.int64)

    def add(self, crank) -> None:
        a = np.asarray(crank.angle, float)
        t = np.asarray(crank.t, float)
        if a.size < 2:
            return
        ok = np.asarray(crank.valid, bool) & np.isfinite(a)
        good = ok[1:] & ok[:-1] & (np.diff(a) > 0) & (np.diff(t) > 0)
        if not good.any():
            return
        da, dt = np.diff(a)[good], np.diff(t)[good]
        mid = 0.5 * (a[1:] + a[:-1])[good]
        w2 = np.deg2rad(da / dt) ** 2
        _, inv = np.unique(np.floor(mid / self.cycle_deg), return_inverse=True)
        w2n = w2 / (np.bincount(inv, w2) / np.bincount(inv))[inv]
        b = np.clip((np.mod(mid, self.cycle_deg) / self.bin_deg).astype(int), 0, self.nb - 1)
        self.sums += np.bincount(b, w2n, minlength=self.nb)
        self.counts += np.bincount(b, minlength=self.nb)

    def profile(self) -> tuple[np.ndarray, np.ndarray]:
        """Bin centres (deg) and mean normalised ω² per bin (gaps filled by interpolation)."""
        centres = (np.arange(self.nb) + 0.5) * self.bin_deg
        have = self.counts > 0
        if have.sum() < self.nb // 2:
            raise InputError(
                f"too little synced crank data for a layout check: {int(have.sum())} of "
                f"{self.nb} angle bins"
            )
        prof = self.sums[have] / self.counts[have]
        return centres, np.interp(centres, centres[have], prof, period=self.cycle_deg)


def identify_layout(
    data,
    candidates: dict[str, Engine],
    *,
    expected: str | None = None,
    bin_deg: float = 6.0,
) -> list[tuple[str, float]]:
    """Score candidate layouts against the firing pattern seen in the crank speed.

    Parameters
    ----------
    data : SpeedProfile, CrankAngles-like (``t``, ``angle``, ``valid``) or an EVENT_DTYPE array
        The run's speed profile (:attr:`dsp.analysis.EventAnalyzer.profile`) or crank angles
        (preferred), or events, whose fired intervals are compared with each candidate's
        intervals. Events only work when the rig's layout is nearly right: with a wrong one the
        events' windows miss the combustion and there is little left to compare.
    candidates : dict name -> Engine
    expected : str or None, keyword-only
        The rig's layout name: a :class:`dsp.errors.LayoutMismatchWarning` is issued when another
        candidate scores best.
    bin_deg : float, keyword-only
        Angle resolution of the profile, degrees (the tooth pitch is a good choice).

    Returns
    -------
    list of (name, score), best first; the score is a correlation, 1 = perfect match.
    """
    if not candidates:
        raise InputError("identify_layout needs at least one candidate layout")
    if expected is not None and expected not in candidates:
        raise InputError(f"expected layout {expected!r} is not among {sorted(candidates)}")
    scores: dict[str, float] = {}
    cycle = max(e.cycle_deg for e in candidates.values())
    if isinstance(data, np.ndarray) and data.dtype.names:
        scores = _scores_from_events(data, candidates)
    else:
        if isinstance(data, SpeedProfile):
            prof = data
            if prof.cycle_deg != cycle:
                raise InputError(f"profile covers {prof.cycle_deg} deg, candidates need {cycle}")
        else:
            prof = SpeedProfile(cycle, bin_deg)
            prof.add(data)
        centres, w2 = prof.profile()
        for name, eng in candidates.items():
            scores[name] = _profile_score(centres, w2, eng, cycle, prof.bin_deg)
    ranked = sorted(scores.items(), key=lambda kv: (-kv[1], kv[0]))
    if expected is not None and ranked[0][0] != expected:
        warnings.warn(
            f"the firing pattern fits layout {ranked[0][0]!r} (score {ranked[0][1]:.3f}) better "
            f"than the rig's {expected!r} (score {scores[expected]:.3f})",
            LayoutMismatchWarning,
            stacklevel=2,
        )
    return ranked


def _profile_score(centres, w2, eng: Engine, cycle: float, bin_deg: float) -> float:
    J = equivalent_inertia(centres, eng)
    energy = 0.5 * J * w2
    tq = (np.roll(energy, -1) - np.roll(energy, 1)) / (2 * bin_deg)
    tq = tq - tq.mean()
    fa = firing_angles(eng)
    if eng.cycle_deg < cycle:  # a 2-stroke fires every turn of a 720° profile
        fa = np.concatenate((fa, fa + eng.cycle_deg))
    # cylinder 1's pulse (from 90° before to 90° after its TDC) is the template for every firing
    rel = np.mod(centres + cycle / 2, cycle) - cycle / 2
    pulse = np.where(np.abs(rel) <= 90.0, tq, 0.0)
    template = np.zeros_like(tq)
    for a in fa:
        template += np.interp(np.mod(centres - a, cycle), centres, pulse, period=cycle)
    template -= template.mean()
    den = np.linalg.norm(tq) * np.linalg.norm(template)
    return float(tq @ template / den) if den > 0 else 0.0


def _scores_from_events(events: np.ndarray, candidates: dict[str, Engine]) -> dict[str, float]:
    fired = events["verdict"] == FIRED
    out = {}
    for name, eng in candidates.items():
        cyls, angles = firing_sequence(eng)
        iv = np.diff(np.concatenate((angles, [angles[0] + eng.cycle_deg])))
        after_prev = dict(zip(np.roll(cyls, -1).tolist(), iv.tolist()))
        errs = []
        for c, exp in after_prev.items():
            mean, _, _ = _robust_mean(events["interval_deg"][fired & (events["cylinder"] == c)])
            if np.isfinite(mean):
                errs.append((mean - exp) / eng.cycle_deg)
        out[name] = float(1.0 - np.sqrt(np.mean(np.square(errs)))) if errs else 0.0
    return out
