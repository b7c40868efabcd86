"""Per-cylinder robust statistics behind the misfire verdict (pure Python state, no I/O).

Every number here is the cylinder's own: the baseline of its window work taken from its own
neighbouring cycles, the robust spread of its deviations, the depth scale of its misfires, the
levels used to see a cylinder die. Keeping each cylinder apart removes every deterministic
per-cylinder pattern (tooth-spacing errors at the window ends, an inertia that differs from the
rig file's, compression work outside the window): those move the cylinder's level, slowly and
smoothly with speed, and a difference between neighbouring cycles of the same cylinder cancels
them. What is left is the cycle-to-cycle scatter, against which a misfire is judged in units of
robust standard deviations.

Robust spread: ``1.4826 · median(|d − median(d)|)``, the median absolute deviation scaled to the
standard deviation of a normal distribution (standard statistics; scipy.stats.median_abs_deviation
with ``scale='normal'`` uses the same constant, 1/Φ⁻¹(3/4)).

The classes are streaming state updated one event at a time, in event order, so that a run gives
the same numbers however it is cut into chunks.
"""

from __future__ import annotations

from collections import deque

#: 1 / Φ⁻¹(3/4): MAD → standard deviation of a normal distribution (standard statistics)
MAD_TO_SIGMA = 1.4826


def median(values) -> float:
    """Median of a short sequence of floats (NaN when empty); plain Python, cheap for n < 100."""
    s = sorted(values)
    m = len(s)
    if not m:
        return float("nan")
    h = m // 2
    return s[h] if m % 2 else 0.5 * (s[h - 1] + s[h])


def robust_spread(values) -> float:
    """``MAD_TO_SIGMA · median(|v − median(v)|)`` (NaN when empty)."""
    med = median(values)
    return MAD_TO_SIGMA * median([abs(v - med) for v in values])


class CylinderState:
    """What one cylinder has shown so far.

    Parameters
    ----------
    history : int
        Accepted (not flagged) events kept for the baseline, in cycles.
    spread_events : int
        Deviations kept for the robust spread.
    pattern_events : int
        Candidate flags kept for the self-check.
    """

    def __init__(self, history: int, spread_events: int, pattern_events: int) -> None:
        self.hx: deque[float] = deque(maxlen=history)  # accepted window work, J
        self.hy: deque[float] = deque(maxlen=history)  # accepted work minus the others', J
        self.dev: deque[float] = deque(maxlen=spread_events)  # accepted self deviations, J
        self.dev_x: deque[float] = deque(maxlen=spread_events)  # accepted cross deviations, J
        self.recent: deque[float] = deque(maxlen=2 * history)  # every counted work, flagged or not
        self.flags: deque[bool] = deque(maxlen=pattern_events)  # candidate misfire or not
        self.misfire_dev: dict[int, deque[float]] = {}  # rpm cell → deviations of misfires, J
        self.misfire_rpm: dict[int, deque[float]] = {}  # rpm cell → their speeds, rpm
        self.misfire_z: dict[int, deque[float]] = {}  # rpm cell → their scores, robust sigma
        self.motored: dict[int, deque[float]] = {}  # rpm cell → work on fuel cut, J
        self.level = float("nan")  # median of ``recent``
        self.ever_healthy = False  # an event judged fired after the warm-up
        self.shares: deque[float] = deque(maxlen=spread_events)  # contribution when fired
        self.recent_share: deque[float] = deque(maxlen=16)  # contribution, flagged or not
        self.run: list[float] = []  # contributions of the current run of misfires
        self.spell_mid = float("nan")  # share below which a dead spell goes on
        self.spell_mid_x = float("nan")  # metric below which a dead spell goes on
        self.run_x: list[float] = []  # metric of the current run of misfires
        self.run_z: list[float] = []  # their scores, robust sigma
        self.dead_since: float | None = None  # start of the current dead spell, s
        self.spell_by_run = False  # the current spell began as a run of misfires
        self.spell_z = float("inf")  # that run's median score, robust sigma
        self.first_dead: float | None = None  # start of the first dead spell, s
        self.partial_streak = 0  # partial burns in a row
        self.weak = False  # in a weak spell: a run of partial burns, not yet fired again
        self.first_weak: float | None = None  # start of the first weak spell, s
        self.unusable_reason: str | None = None
        self.stale = False  # the baselines predate a fuel cut: relearn them after it
        self.rewarm = 0  # events still to learn before deciding again (after a fuel cut)
        self._spread_cache: tuple[int, float, float] | None = None
        self._n_added = 0

    # -- baselines ------------------------------------------------------------------------------
    def baseline(self, ahead: list[float], *, screen_below: float | None) -> float:
        """Median of the accepted history and the look-ahead values not below ``screen_below``."""
        vals = list(self.hx)
        if screen_below is None:
            vals += ahead
        else:
            vals += [a for a in ahead if a >= screen_below]
        return median(vals)

    def cross_baseline(self, ahead: list[float], *, screen_below: float | None) -> float:
        vals = list(self.hy)
        if screen_below is None:
            vals += ahead
        else:
            vals += [a for a in ahead if a >= screen_below]
        return median(vals)

    def spreads(self) -> tuple[float, float]:
        """Robust spreads of the self and cross deviations (cached until a value is added)."""
        # refreshed every 4th new value once the spread has settled: a MAD moves slowly, and
        # two sorts per event were most of the decision's time
        stale = self._spread_cache is None or (
            self._n_added - self._spread_cache[0] >= (8 if len(self.dev) >= 16 else 1))
        if stale:
            s = robust_spread(self.dev) if self.dev else float("nan")
            sx = robust_spread(self.dev_x) if self.dev_x else float("nan")
            self._spread_cache = (self._n_added, s, sx)
        assert self._spread_cache is not None
        return self._spread_cache[1], self._spread_cache[2]

    def restart_baseline(self, events: int) -> None:
        """Forget the baselines (not the spreads) and learn ``events`` events before deciding:
        after a fuel cut the engine fires at another speed and load, where every per-cylinder
        pattern has another level."""
        self.hx.clear()
        self.hy.clear()
        self.stale, self.rewarm = False, events

    def accept(self, x: float, y: float, d: float, dx: float) -> None:
        """An event judged fired joins the baselines and the spreads."""
        self.hx.append(x)
        self.hy.append(y)
        if d == d:  # not NaN
            self.dev.append(d)
            self._n_added += 1
        if dx == dx:
            self.dev_x.append(dx)
            self._n_added += 1

    def add_recent(self, x: float, share: float = float("nan")) -> None:
        """A counted event's metric and share of the engine's work, flagged or not (for the
        dead-cylinder check)."""
        self.recent.append(x)
        self.level = median(self.recent)
        if share == share:
            self.recent_share.append(share)

    # -- depth scale ----------------------------------------------------------------------------
    def add_misfire(self, cell: int, dev: float, keep: int, rpm: float = float("nan"),
                    z: float = float("nan")) -> None:
        self.misfire_dev.setdefault(cell, deque(maxlen=keep)).append(dev)
        self.misfire_rpm.setdefault(cell, deque(maxlen=keep)).append(rpm)
        self.misfire_z.setdefault(cell, deque(maxlen=keep)).append(z)

    def add_motored(self, cell: int, x: float, keep: int) -> None:
        self.motored.setdefault(cell, deque(maxlen=keep)).append(x)

    def depth_scale(self, cell: int, baseline: float, *, min_count: int) -> float:
        """Work a complete misfire of this cylinder takes away here, J (NaN: not calibrated).

        From the cylinder's motored level on fuel cut in the same rpm cell (offset-free: the same
        per-cylinder bias is in both), else from its own misfires in that cell (the upper half of
        their deviations, so that partial burns among them do not shrink the scale); failing
        both, from the cell below or above (1000 rpm apart: the bias changes little).
        """
        for near in (cell, cell - 1, cell + 1):  # the cell, else a neighbouring one
            mot = self.motored.get(near)
            if mot is not None and len(mot) >= min_count:
                scale = baseline - median(mot)
                if scale > 0:
                    return scale
            mis = self.misfire_dev.get(near)
            if mis is not None and len(mis) >= min_count:
                s = sorted(mis)
                return median(s[len(s) // 2 :])
        return float("nan")

    def own_misfire_scale(self, cell: int, rpm: float, *, min_count: int, max_spread: float,
                          rpm_share: float, min_z: float) -> float:
        """Median work the cylinder's clear misfires took away at about this speed, J, or NaN.

        Taken: the misfires of the rpm cell within ``rpm_share`` of ``rpm`` (during a sweep a
        misfire's trace changes with speed and with the lag of the reference: a cluster from
        another speed is no scale) that scored at least ``min_z`` (a flag close to the threshold
        is no measure of a whole misfire). At least ``min_count`` of them must agree within
        ``max_spread`` (robust spread over median).
        """
        devs = self.misfire_dev.get(cell)
        if devs is None or len(devs) < min_count or not rpm == rpm:
            return float("nan")
        near = [d for d, r, z in zip(devs, self.misfire_rpm[cell], self.misfire_z[cell])
                if abs(r - rpm) <= rpm_share * rpm and z >= min_z]
        if len(near) < min_count:
            return float("nan")
        m = median(near)
        return m if m > 0 and robust_spread(near) <= max_spread * m else float("nan")

    # -- self-check -----------------------------------------------------------------------------
    def pattern_implausible(self, *, min_events: int) -> str | None:
        """Why the recent candidate flags fit no misfire pattern (None when they do).

        A real fault misfires at random (at any rate: a failing coil can miss every other
        event at random), in bursts, or on every event (a dead cylinder). Flags that change
        state on more than 60 % of consecutive events are beyond what random misfiring at any
        rate gives (2p(1 - p) <= 0.5 changes per event): a metric that swings between two
        levels, a bias or a beat, not combustion.
        """
        f = self.flags
        if len(f) < min_events:
            return None
        k = sum(f)
        share = k / len(f)
        if share < 0.2 or share > 0.85:
            return None
        changes = sum(1 for a, b in zip(f, list(f)[1:]) if a != b)
        if changes >= 0.6 * (len(f) - 1):
            return (f"its metric swings every other cycle ({100 * share:.0f} % of its last "
                    f"{len(f)} events would be misfires, alternating)")
        return None
