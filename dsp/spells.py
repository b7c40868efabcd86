"""Dead and weak spells of a cylinder: seen from its level, its share of the work and its runs.

A dead spell (no combustion for a while, from the start of a ride or mid-ride) and a weak spell
(a run of partial burns) are judged here, apart from the per-event score of
:mod:`dsp.misfire`: both read the cylinders' :class:`dsp.cylinder_stats.CylinderState` and both
make the other cylinders relearn when they start or end. Each event's metric compares the crank's
speed after its TDC with the speed the event before it left, so when one cylinder stops, weakens
or resumes firing, its neighbours' levels move too.

A cylinder is dead (every event ``MISFIRE``, its baseline frozen, never adapted to it) from
the first cycles of a ride when it reads below every other cylinder, below ``dead_ratio`` of
their median level, without their scatter, and either (uneven firing: the cylinders' levels
differ by geometry there) with a share of the engine's work below ``dead_start_share``, or
(even firing) with a gap below the others' median of at least ``DEAD_GAP_OVER_RANGE`` times
the range of their levels; mid-ride when a run of ``dead_run`` misfires comes with its share
of the work falling by ``dead_share_drop`` more than the other cylinders' shares fall (shares
trusted only where fired ones read like shares), or, on an even-firing engine, reads steadily
below every other cylinder (the four's window work hardly falls for a dead cylinder, so its
share cannot tell). A spell ends halfway back to where the cylinder fired (one from the start
of an uneven engine: once it reads above ``dead_ratio`` of the others). A spell's start
and end make the other cylinders relearn their baselines: each step starts from the crank
speed the event before it left.

Pure Python state updated one event at a time, in event order (streaming equals whole-array).
"""

from __future__ import annotations

from crankbeat.dsp.cylinder_stats import CylinderState, median, robust_spread
from crankbeat.dsp.misfire_settings import MisfireSettings

#: On an even-firing engine a cylinder reads dead from the start only when its gap below the
#: others' median is this many times the range of the others' levels: fired cylinders read alike
#: there, so a gap no larger than their own differences is a pattern (a cross-plane crank read as
#: a flat one spreads its healthy cylinders' levels over more than the gap), not a dead cylinder.
DEAD_GAP_OVER_RANGE = 1.5


class SpellWatch:
    """Dead and weak spells of every cylinder of one engine.

    Parameters
    ----------
    cylinders : list of CylinderState
        The misfire decision's per-cylinder state (shared: the spells read and set it).
    settings : MisfireSettings
    even : bool
        Every firing the same angle apart (the cylinders' fired levels read alike).
    z_threshold : float
        The decision's threshold, robust sigma.
    """

    def __init__(self, cylinders: list[CylinderState], settings: MisfireSettings, *,
                 even: bool, z_threshold: float) -> None:
        self._cyl = cylinders
        self.s = settings
        self.n = len(cylinders)
        self._even = even
        self._z = z_threshold

    def dead(self, c: int, x: float, contrib: float, cand: bool, t: float, *,
              partial_like: bool = False, z: float = float("nan")) -> bool:
        """Cylinder c is in a dead spell: no combustion for a while, from the start or mid-ride.

        Mid-ride, a run of ``dead_run`` misfires in a row (the last one not ``partial_like``:
        short of a whole misfire on a calibrated depth scale) starts a spell when the cylinder's
        share of the engine's work (``contribution``) collapsed by ``dead_share_drop``, or when
        the run's scores ``z`` read a clear loss against the cylinder's own fired level (median
        at least twice the threshold, see :meth:`_own_loss`), or, on an even-firing engine, when
        the run reads steadily below every other cylinder's level. A
        cylinder that never fired has no level before: it is told by a metric far below the
        others' (under ``dead_ratio`` of their level and below every one of them) without their
        combustion scatter, and on an uneven-firing engine a share of the engine's work below
        ``dead_start_share`` (there the cylinders' levels differ by geometry alone).
        A spell lasts while the cylinder reads below halfway between where it started and where
        fired cylinders read (the share where the share started it, else the metric); one that
        began as a run of misfires ends as soon as an event's own score ``z`` is below half the
        run's median score.
        """
        st = self._cyl[c]
        if self.n < 2:
            return False
        st.run = st.run + [contrib] if cand else []
        st.run_x = st.run_x + [x] if cand else []
        st.run_z = st.run_z + [z] if cand else []
        lv = [o.level for i, o in enumerate(self._cyl) if i != c and len(o.recent) >= 4]
        lv_o = median(lv) if lv else float("nan")
        lim = self.s.dead_ratio * lv_o
        if st.dead_since is not None:
            if st.spell_by_run and z == z and z < 0.5 * st.spell_z:
                # a spell that began as a run of misfires ends on the first event that reads
                # halfway back to fired on its own score (the run's median score halved): the
                # cylinder's fired baseline is frozen through the spell, so that score is
                # trustworthy where the share of the work is not (behind a ringing driveline a
                # fired event's share stayed under the mark); halfway, because a dead cylinder
                # with a scattered fired level reads only 5-6 sigma down, and one dead event
                # under the threshold must not end its spell
                dead = False
            elif st.spell_mid == st.spell_mid:
                dead = contrib == contrib and contrib < st.spell_mid
            elif st.spell_mid_x == st.spell_mid_x:
                dead = x < st.spell_mid_x
            else:  # dead from the start (uneven engine): while it stays far below the others
                dead = lv_o > 0 and x < lim
        else:
            dead = st.ever_healthy and (
                len(st.run) >= self.s.dead_run and not partial_like
                and (self._share_collapsed(c) or self._own_loss(c)
                     or self._reads_dead(c, st.run_x, lv)))
            st.spell_by_run = dead
            zs = [v for v in st.run_z if v == v]
            st.spell_z = median(zs) if dead and zs else float("inf")
            # by its level alone: before it ever fired, or at any time on an even-firing engine
            # (a cylinder dead from the first cycle may have been judged fired in them)
            if not dead and (self._even or not st.ever_healthy):
                dead = self._level_dead(c, x, lv, lim)
        if dead and st.dead_since is None:
            st.dead_since = t
            self._others_relearn(c)
        elif not dead and st.dead_since is not None:
            st.dead_since = None
            st.spell_mid = st.spell_mid_x = float("nan")
            st.spell_by_run = False
            self._others_relearn(c)
        return dead

    def _level_dead(self, c: int, x: float, lv: list[float], lim: float) -> bool:
        """The cylinder's recent level reads dead against the others' (see :meth:`dead`);
        ``lim`` is ``dead_ratio`` of the others' median level."""
        if not (lim > 0 and x < lim):  # the cheap test first: this runs on every event
            return False
        st = self._cyl[c]
        own = list(st.recent)[-15:] + [x]
        # on an uneven engine the share must agree: the metric's level differs between the
        # cylinders there (a twin-270's second cylinder reads far lower)
        low_share = (self._even or len(st.recent_share) >= 4
                     and median(st.recent_share) < self.s.dead_start_share)
        return (len(own) >= 4 and median(own) < lim and low_share
                and self._reads_dead(c, own, lv, start=True))

    def _own_loss(self, c: int) -> bool:
        """The run of misfires of cylinder c reads a clear loss against its own fired level: its
        median score is at least twice the threshold (a clear misfire, as the own-misfire depth
        scale counts them). A level that drifts (a driveline mode moving with speed) crosses
        the threshold gradually; a cylinder that stops firing drops at once by a whole misfire.
        The share of the engine's work cannot always tell: behind a clutch and gearbox that ring
        the window-work estimate of a dead cylinder may even rise. Sets the level that ends the
        spell, halfway back to where the cylinder fired."""
        st = self._cyl[c]
        if not st.hx or median(st.run_z) < 2.0 * self._z:
            return False
        st.spell_mid_x = 0.5 * (median(st.run_x) + median(st.hx))
        return True

    def _share_collapsed(self, c: int) -> bool:
        """The run of misfires of cylinder c took its share of the engine's work down by
        ``dead_share_drop`` more than the other cylinders' shares fell (sets the spell's mid)."""
        st = self._cyl[c]
        shares = [v for v in st.run if v == v]
        # against the others' shares over the same time: when a dead cylinder fires again, the
        # engine's typical work rises and every other share drops with it. A share is trusted
        # only where the fired ones read like shares (about 1): a work estimate near zero on
        # average (the loss balance off by the unknown inertia) makes every ratio to it noise
        fired_share = median(st.shares) if len(st.shares) >= 8 else float("nan")
        if 0.25 < fired_share < 4.0 and shares and (
                fired_share - median(shares) - self._others_share_drop(c)
                > self.s.dead_share_drop):
            st.spell_mid = 0.5 * (fired_share + median(shares))
            return True
        return False

    def _reads_dead(self, c: int, own: list[float], lv: list[float], *,
                    start: bool = False) -> bool:
        """``own`` (cylinder c's recent metric) reads dead against the other cylinders' levels
        ``lv``: below every one of them by ``z_threshold`` of their spread, steadily (without
        their combustion scatter). Mid-ride only on an even-firing engine, where fired
        cylinders read alike. Sets the level that ends the spell, halfway up."""
        if not (start or self._even) or not lv or len(own) < 4:
            return False
        st = self._cyl[c]
        # the others' spreads only now: a sort per cylinder, and most events end above
        sp = [robust_spread(o.recent) for i, o in enumerate(self._cyl)
              if i != c and len(o.recent) >= 4]
        level, lowest, spread = median(own), min(lv), median(sp)
        gap = median(lv) - level
        if not (level < lowest and gap > self._z * spread
                and robust_spread(own) < self.s.dead_scatter * spread):
            return False
        if start and self._even and (len(lv) < self.n - 1
                                     or gap < DEAD_GAP_OVER_RANGE * (max(lv) - lowest)):
            # every other cylinder must have a level, and they must read alike: levels that
            # differ by a pattern (another crank than the rig file's, a wheel never learnt, a
            # flat four's pairs at speed) as large as this cylinder's gap tell no dead cylinder
            return False
        if self._even:  # the spell ends halfway back to where it fired (or the others fire)
            fired = median(st.hx) if not start and st.hx else lowest
            if own[-1] >= 0.5 * (level + fired):
                return False  # this event reads above where the spell would end: it fired
            st.spell_mid_x = 0.5 * (level + fired)
        return True

    def _others_share_drop(self, c: int) -> float:
        """Median fall of the other cylinders' shares: recent ones against their fired history."""
        drops = [median(o.shares) - median(o.recent_share) for i, o in enumerate(self._cyl)
                 if i != c and len(o.shares) >= 8 and o.recent_share]
        return median(drops) if drops else 0.0

    def weak(self, c: int, partial: bool, t: float) -> None:
        """A run of ``dead_run`` partial burns starts a weak spell of cylinder c, its next fired
        event ends it; both make the others relearn, as a dead spell's start and end do."""
        st = self._cyl[c]
        st.partial_streak = st.partial_streak + 1 if partial else 0
        weak = partial and (st.weak or st.partial_streak >= self.s.dead_run)
        if weak != st.weak:
            st.weak = weak
            self._others_relearn(c)
            if st.weak and st.first_weak is None:
                st.first_weak = t

    def _others_relearn(self, c: int) -> None:
        """A dead or weak spell starts or ends on cylinder c: the others relearn their baselines.
        Each event's metric compares the crank's speed after its TDC with the speed before,
        which the event before it set: when one cylinder stops, weakens or resumes firing, its
        neighbours' levels move too (the next cylinder starts from a slower crank)."""
        for i, o in enumerate(self._cyl):
            if i != c:
                o.stale = True
