"""Firing intervals and layout family from the run's averaged crank-speed cycle.

Method
------
:class:`CycleProfile` averages, edge slot by edge slot over the working cycle, the crank speed of
each tooth interval divided by the mean speed of the 720° (or 360°) centred on it, so cycles at
every speed weigh alike and a steady speed trend cancels. The slot positions are the wheel's own
edges, so the gap and the tooth pitch are no binning artefact. :meth:`CycleProfile.torque` turns
the averaged profile into the cycle's torque shape: the time-versus-angle curve through the slot
edges (exact integrals of the interval periods) is a periodic cubic spline whose slope gives
ω(θ); ``d(½J(θ)ω²)/dθ`` is the torque, low-passed to a crank order that the wheel resolves.

:func:`profile_intervals` times each cylinder's combustion pulse against the mean pulse of all
cylinders by cross-correlation (sub-degree by parabolic refinement). The common offset (a TDC
offset error moves every pulse alike) drops out of the intervals, and with identical pulses on a
perfect wheel the estimate carries no bias from where the teeth or the gap fall.

:func:`layout_verdict` scores each candidate layout by how well the mean pulse repeated at the
candidate's firing angles explains the torque profile up to ``max_order`` (orders the wheel's
once-per-revolution tooth errors hardly reach), and names layouts with the same firing pattern
as one family: they cannot be told apart from the crank.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.kinematics import equivalent_inertia
from crankbeat.dsp.layout import firing_sequence, layout_signature
from crankbeat.errors import InputError

__all__ = ["CycleProfile", "IntervalEstimate", "LayoutVerdict", "layout_verdict",
           "profile_intervals"]

#: Pulse span timed around each firing TDC, degrees (compression end and combustion).
PULSE_SPAN = (-60.0, 120.0)
#: Largest timing shift searched per cylinder, degrees.
MAX_SHIFT_DEG = 25.0
GRID_DEG = 0.25
#: Another layout contradicts the rig file only where it leaves at most half the rig layout's
#: misfit (1 − score). Measured on simulated rides with physics the analyser is not told (the
#: quality matrix, 10 seeds per cell): correct rig files whose twin runs beside a torsional mode
#: near a firing order gave ratios 1.3-1.8, engines built with another crank than the rig file's
#: 2.2-12 (a flat four read as a cross-plane one, once, 1.55: not told).
CLEAR_MISFIT_RATIO = 2.0


class CycleProfile:
    """Running average of the normalised crank speed per edge slot of the cycle (bounded memory).

    Parameters
    ----------
    cycle_deg : float
        720 for a 4-stroke.
    pitch_deg : float
        The wheel's tooth pitch, deg.
    """

    def __init__(self, cycle_deg: float, pitch_deg: float) -> None:
        if not (cycle_deg > 0 and 0 < pitch_deg < cycle_deg / 8):
            raise InputError(f"bad cycle {cycle_deg!r} / pitch {pitch_deg!r}")
        self.cycle = float(cycle_deg)
        self.slot_deg = pitch_deg / 4.0
        self.n_slots = int(round(self.cycle / self.slot_deg))
        self.sum_x = np.zeros(self.n_slots)
        self.sum_a = np.zeros(self.n_slots)
        self.count = np.zeros(self.n_slots, np.int64)
        self.tail: tuple[np.ndarray, ...] | None = None
        self.next = 1  # first edge of the tail not yet used
        self.edges = 0

    def push(self, crank) -> None:
        """Add the edges of one push (``t``, ``angle``, ``valid`` of :class:`CrankAngles`)."""
        cols = (np.asarray(crank.t, float), np.asarray(crank.angle, float),
                np.asarray(crank.valid, bool) & np.isfinite(crank.angle))
        fin = np.isfinite(cols[1])  # edges not synced carry no angle: their neighbours go unused
        cols = tuple(c[fin] for c in cols)
        cols[2][1:] &= np.diff(cols[1]) < self.cycle / 8
        if self.tail is not None:
            cols = tuple(np.concatenate((a, b)) for a, b in zip(self.tail, cols))
        t, a, ok = cols
        n = t.size
        if n < 3:
            self.tail = cols
            return
        # centred cycle: the edge whose angle is closest to a - C/2 and a + C/2
        half = self.cycle / 2
        lo = np.searchsorted(a, a - half)
        hi = np.searchsorted(a, a + half) - 1
        have = (lo > 0) & (a + half <= a[-1]) & (hi > lo)
        j = np.flatnonzero(have[1:]) + 1
        j = j[j >= self.next]
        lo_j, hi_j = lo[j], np.minimum(hi[j], n - 1)
        span_a = a[hi_j] - a[lo_j]
        span_t = t[hi_j] - t[lo_j]
        # every edge within the span valid: a prefix count of bad edges
        bad = np.concatenate(([0], np.cumsum(~ok)))
        clean = (bad[hi_j + 1] - bad[lo_j] == 0) & ok[j - 1]
        clean &= np.abs(span_a - self.cycle) < 0.1 * self.cycle
        da = a[j] - a[j - 1]
        dt = t[j] - t[j - 1]
        clean &= (da > 0) & (dt > 0) & (span_t > 0)
        j, da, dt = j[clean], da[clean], dt[clean]
        x = (da / dt) / (span_a[clean] / span_t[clean])
        pos = np.mod(a[j], self.cycle)
        s = np.mod(np.round(pos / self.slot_deg).astype(np.int64), self.n_slots)
        self.sum_x += np.bincount(s, x, minlength=self.n_slots)
        self.sum_a += np.bincount(s, pos, minlength=self.n_slots)
        self.count += np.bincount(s, minlength=self.n_slots)
        self.edges += j.size
        # edges without half a cycle after them wait; keep a cycle of look-back before them
        waiting = np.flatnonzero(a + half > a[-1])
        first_waiting = int(waiting[0]) if waiting.size else n
        first_waiting = max(first_waiting, self.next)
        look = a[min(first_waiting, n - 1)] - 1.2 * half
        keep = max(0, min(int(np.searchsorted(a, look)) - 2, first_waiting - 1))
        self.tail = tuple(c[keep:] for c in cols)
        self.next = first_waiting - keep

    def slots(self, min_count: int = 5) -> tuple[np.ndarray, np.ndarray]:
        """Mean edge angle (deg in the cycle) and mean normalised speed of the used slots."""
        use = self.count >= min_count
        return self.sum_a[use] / self.count[use], self.sum_x[use] / self.count[use]

    def torque(self, engine: Engine, *, max_order: float | None = None,
               tooth_correction: tuple[np.ndarray, np.ndarray] | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
        """Grid (deg, step :data:`GRID_DEG`) and normalised torque ``d(½Jω²)/dθ`` on it.

        ``max_order`` (per revolution) defaults to 6 or a quarter of the teeth, the smaller: the
        wheel's tooth errors grow with order in the torque and would steer the timing.
        """
        pos, x = self.slots()
        if pos.size < 16:
            raise InputError(f"too little synced crank data for a cycle profile: {pos.size} "
                             "edge positions")
        order = np.argsort(pos)
        pos, x = pos[order], x[order]
        da = np.diff(np.concatenate((pos, [pos[0] + self.cycle])))
        # the slot's speed is the mean over the interval ending at its edge
        dt = da / np.roll(x, -1)
        tau = np.concatenate(([0.0], np.cumsum(dt)))
        knots = np.concatenate((pos, [pos[0] + self.cycle]))
        tau = tau - tau[-1] * (knots - knots[0]) / self.cycle  # periodic: drop the mean slope
        spline = CubicSpline(knots, tau, bc_type="periodic")
        grid = np.arange(0.0, self.cycle, GRID_DEG)
        slope = spline(np.mod(grid - knots[0], self.cycle) + knots[0], 1)
        omega = 1.0 / (1.0 + slope)  # relative to the cycle mean (dτ/dθ = 1 on average)
        energy = 0.5 * equivalent_inertia(grid, engine) / engine.inertia_kgm2 * omega**2
        spec = np.fft.rfft(energy)
        orders = np.arange(spec.size) * 360.0 / self.cycle
        if max_order is None:
            max_order = min(6.0, 360.0 / (2.0 * float(np.median(da))))
        spec[orders > max_order] = 0.0
        spec[0] = 0.0
        # derivative in the frequency domain: exact for the band-limited profile
        k = 2j * np.pi * np.arange(spec.size) / self.cycle
        return grid, np.fft.irfft(spec * k, n=grid.size)


@dataclass(frozen=True)
class IntervalEstimate:
    """Firing interval from one cylinder to the next, from the averaged cycle (deg)."""

    from_cylinder: int
    to_cylinder: int
    expected_deg: float
    observed_deg: float


def _pulses(grid: np.ndarray, tq: np.ndarray, angles: np.ndarray, cycle: float,
            shifts: np.ndarray) -> np.ndarray:
    rel = np.arange(PULSE_SPAN[0], PULSE_SPAN[1] + GRID_DEG / 2, GRID_DEG)
    return np.stack([np.interp(np.mod(a + s + rel, cycle), grid, tq, period=cycle)
                     for a, s in zip(angles, shifts)])


def _best_shift(grid, tq, angle, template, cycle, weight) -> float:
    lags = np.arange(-MAX_SHIFT_DEG, MAX_SHIFT_DEG + GRID_DEG / 2, GRID_DEG)
    seg = _pulses(grid, tq, angle + lags, cycle, np.zeros(lags.size))
    c = seg @ (template * weight)
    i = int(np.argmax(c))
    if 0 < i < c.size - 1:
        den = c[i - 1] - 2 * c[i] + c[i + 1]
        frac = 0.5 * (c[i - 1] - c[i + 1]) / den if den < 0 else 0.0
    else:
        frac = 0.0
    return float(lags[i] + frac * GRID_DEG)


def profile_intervals(grid: np.ndarray, tq: np.ndarray, engine: Engine, *,
                      iterations: int = 3) -> list[IntervalEstimate]:
    """Each cylinder's pulse timed against the mean pulse; intervals in firing order.

    Parameters
    ----------
    grid, tq : (m,) arrays
        :meth:`CycleProfile.torque`.
    engine : Engine
        The rig's layout (where the pulses are looked for).
    """
    cyls, angles = firing_sequence(engine)
    cycle = engine.cycle_deg
    weight = np.ones(int(round((PULSE_SPAN[1] - PULSE_SPAN[0]) / GRID_DEG)) + 1)
    shifts = np.zeros(len(angles))
    for _ in range(iterations):
        pulses = _pulses(grid, tq, angles, cycle, shifts)
        template = pulses.mean(axis=0)
        template = template - template.mean()
        shifts = np.array([_best_shift(grid, tq, a, template, cycle, weight)
                           for a in angles])
        shifts -= shifts.mean()
    at = angles + shifts
    iv = np.diff(np.concatenate((at, [at[0] + cycle])))
    exp = np.diff(np.concatenate((angles, [angles[0] + cycle])))
    nxt = np.roll(cyls, -1)
    return [IntervalEstimate(int(c), int(d), float(e), float(o))
            for c, d, e, o in zip(cyls, nxt, exp, iv)]


@dataclass(frozen=True)
class LayoutVerdict:
    """What the crank says about the layout.

    ``families``: (names, score) best first, names of one firing pattern joined; ``fits_rig``:
    True when the rig's layout is in the best family or scores within the margin of it, False
    when another family fits clearly better (see :func:`layout_verdict`), None when another
    fits better but not clearly: the layout is then not judged; ``margin``: best score minus the
    rig's family's score.
    """

    families: list[tuple[str, float]]
    rig_family: str
    fits_rig: bool | None
    margin: float

    def note(self) -> str | None:
        best, score = self.families[0]
        rig_score = score - self.margin
        if self.fits_rig is None:
            return (f"layout not judged: the firing pattern fits {best} ({score:.2f}) a little "
                    f"better than the rig's {self.rig_family} ({rig_score:.2f}), not clearly "
                    "(the crank's response to the firing pulses is not what a rigid engine "
                    "gives, or a cylinder fires weakly): misfire verdicts and alerts stand")
        if self.fits_rig:
            return None
        return (f"the firing pattern fits {best} (score {score:.2f}) clearly better than the "
                f"rig's {self.rig_family} ({rig_score:.2f}): misfire verdicts are not trusted "
                "and no misfire alert is raised until the rig file's layout is checked")


def _model_score(grid, tq, eng: Engine, cycle: float) -> float:
    _, fa = firing_sequence(eng)
    if eng.cycle_deg < cycle:
        fa = np.concatenate((fa, fa + eng.cycle_deg))
    rel = np.mod(grid + cycle / 2, cycle) - cycle / 2
    inside = (rel >= -90.0) & (rel <= 90.0)
    pulse = np.zeros_like(tq)
    for a in fa:  # the mean pulse of the candidate's firings
        pulse += np.interp(np.mod(grid + a, cycle), grid, tq, period=cycle)
    pulse = np.where(inside, pulse / len(fa), 0.0)
    model = sum(np.interp(np.mod(grid - a, cycle), grid, pulse, period=cycle) for a in fa)
    model = model - model.mean()
    den = np.linalg.norm(tq) * np.linalg.norm(model)
    return float(tq @ model / den) if den > 0 else 0.0


def layout_verdict(profile: CycleProfile, candidates: dict[str, Engine], expected: str, *,
                   max_order: float = 4.0, margin: float = 0.05,
                   clear_misfit_ratio: float = CLEAR_MISFIT_RATIO) -> LayoutVerdict:
    """Score candidate layouts on the low orders of the cycle's torque (see module docstring).

    Each candidate is scored on the torque its own kinematics give: the inertia torque of the
    reciprocating masses depends on the crank throws (a flat-plane four's is a strong second
    order, a cross-plane four's nearly none), and removing the rig's where the engine has
    another leaves a pattern that favours the rig's layout.

    The rig's layout is contradicted (``fits_rig`` False) only when another family scores more
    than ``margin`` above it AND leaves at most 1 / ``clear_misfit_ratio`` of its misfit
    (1 − score). A family that scores a little higher while no family fits well (a torsional
    mode of the driveline near a firing order reshapes the speed profile; a dead cylinder
    leaves one pulse in the cycle) is no evidence against the rig file: then the layout is not
    judged (None), and misfire alerts are not withheld.
    """
    if expected not in candidates:
        raise InputError(f"expected layout {expected!r} is not among {sorted(candidates)}")
    groups: dict[tuple, list[str]] = {}
    for name, eng in candidates.items():
        groups.setdefault(layout_signature(eng), []).append(name)
    fam = []
    for names in groups.values():
        score = max(_model_score(*profile.torque(candidates[n], max_order=max_order),
                                 candidates[n], profile.cycle) for n in names)
        fam.append((" / ".join(sorted(names)) + (": same firing" if len(names) > 1 else ""),
                    score, names))
    fam.sort(key=lambda f: -f[1])
    mine = next(f for f in fam if expected in f[2])
    diff = fam[0][1] - mine[1]
    fits: bool | None = True
    if diff > margin:
        clear = (1.0 - mine[1]) >= clear_misfit_ratio * (1.0 - fam[0][1])
        fits = False if clear else None
    return LayoutVerdict([(f[0], f[1]) for f in fam], mine[0], fits, diff)
