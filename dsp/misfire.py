"""Misfire decision per firing event, on each cylinder's own robust statistics.

Feature
-------
``x_k``: the energy step across the event's TDC (:mod:`dsp.fluctuation`, field ``step``, J):
½·J̄·(ω̄²after − ω̄²before), the mean speeds taken over one stroke (or the firing interval where
shorter) each side of TDC + 20°. It carries per-cylinder patterns (the slider-crank energy
exchange, tooth-spacing errors at the segment ends, the other cylinders' strokes, the state of the
cylinder before it) that move slowly with speed, and a scale set by the rig file's inertia.
Neither matters here: every decision compares an event only with the same cylinder's neighbouring
cycles, where the pattern is the same, and measures the difference in that cylinder's own robust
spread, where the scale cancels.

Decision (per event ``k`` of cylinder ``c``, in event order)
---------------------------------------------------------
* self baseline ``B``: median of ``x`` over the cylinder's last ``history_cycles`` events judged
  fired (misfires, partial burns, fuel cut and dead spells never enter it) and its next
  ``lookahead_cycles`` events (those that are not themselves far below the history);
* ``z = (B − x_k) / s``, ``s`` the robust spread (1.4826·MAD) of the cylinder's recent accepted
  deviations, floored at ``spread_floor`` of the work level;
* the same against the other cylinders around the event (``x − median of the others``, with its
  own baseline and spread): a disturbance that slows the crank for every cylinder at once (a
  bump through the driveline) is not one cylinder's misfire;
* ``MISFIRE`` when ``z > z_threshold`` and the cross score is above ``cross_threshold`` (for a
  single cylinder the self score alone decides);
* a cylinder is dead (every event ``MISFIRE``, its baseline frozen, never adapted to it) from
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
  speed the event before it left;
* depth = missing work ÷ the work of a complete misfire, where an offset-free scale exists (the
  cylinder's motored level on fuel cut, else the upper half of its own misfires in the rpm cell);
  a flagged event shallower than ``partial_depth`` on the motored scale of its rpm cell, or on
  the median of its own misfires there when they agree within ``own_scale_spread``, is
  ``PARTIAL`` (misfires that scatter, as at high speed and light load, give no verdict of depth:
  a misfire called partial is a missed misfire); without a scale, depth is NaN ("not
  calibrated") and the event stays ``MISFIRE``. The step is not linear in the share of the
  charge that burns, and a fuel cut at closed throttle measures a misfire at load poorly
  (simulated Larch at 3500 rpm, 20 % throttle: misfires take away 1.5-1.9 motored scales, a
  45 % burn 0.7-1.1, about half of the misfires' median). A run of ``dead_run`` partial burns is
  a weak spell: like a dead spell's, its start and end make the other cylinders relearn;
* after a fuel cut each cylinder relearns its baselines for ``warmup_cycles`` cycles: the engine
  then fires at another speed and load, where every per-cylinder pattern has another level;
* the threshold rises with the scatter of the recent fired events of all cylinders (a rough
  road), leaving out the events just after a misfire (the next cylinder starts slower: that
  rebound is the misfire's own trace);
* self-check: a cylinder whose candidate flags swing every other cycle, or cover a large share of
  its events with no runs, gets ``UNUSABLE`` events (reason in :meth:`MisfireDetector.report`),
  never misfires;
* the first ``warmup_cycles`` cycles of each cylinder are ``UNUSABLE`` (its statistics fill up).

Each event is decided once the next ``lookahead_cycles`` cycles and the ``n - 1`` events after
them have arrived (the last look-ahead event's cross score reads the other cylinders around it);
the state is updated event by event, so streaming equals whole-array whatever the chunking.

``FUEL_CUT`` when the rpm is at least ``fuel_cut_min_rpm`` and either the throttle is closed (or
unknown) and no cylinder around fires, or the throttle is (or was within ``fuel_cut_hold_s``)
seen closed and the event has no combustion: the ECU's overrun cut, gear changes.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from crankbeat.dsp.cylinder_stats import CylinderState, median, robust_spread
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import (
    CAUSE_CRANK,
    CAUSE_DEAD,
    CAUSE_IMPLAUSIBLE,
    CAUSE_WARMUP,
    FIRED,
    FUEL_CUT,
    MISFIRE,
    PARTIAL,
    UNUSABLE,
    empty_detail,
    empty_events,
)
from crankbeat.dsp.fluctuation import RAW_EVENT_DTYPE
from crankbeat.dsp.layout import firing_sequence
from crankbeat.dsp.misfire_prep import fuel_cut_flags, other_cylinders_level, typical_work
from crankbeat.dsp.misfire_settings import MisfireSettings
from crankbeat.errors import InputError

#: On an even-firing engine a cylinder reads dead from the start only when its gap below the
#: others' median is this many times the range of the others' levels: fired cylinders read alike
#: there, so a gap no larger than their own differences is a pattern (a cross-plane crank read as
#: a flat one spreads its healthy cylinders' levels over more than the gap), not a dead cylinder.
DEAD_GAP_OVER_RANGE = 1.5


class MisfireDetector:
    """Streaming misfire decision over the raw events of :class:`dsp.fluctuation.FluctuationStage`.

    Parameters
    ----------
    engine : Engine
    settings : MisfireSettings, keyword-only

    Notes
    -----
    ``push(raw, throttle)`` takes raw events in order (``throttle`` in %, one per event, NaN when
    unknown) and returns the events that are final, as :data:`dsp.events.EVENT_DTYPE`: each raw
    event comes out exactly once, ``lookahead_cycles`` cycles and ``n - 1`` events later.
    ``finish()`` flushes the
    rest. :meth:`take_detail` returns the :data:`dsp.events.EVENT_DETAIL_DTYPE` rows of the
    events returned since its last call; :meth:`report` the run-level findings.
    """

    def __init__(self, engine: Engine, *, settings: MisfireSettings | None = None):
        self.engine = engine
        self.s = settings or MisfireSettings()
        self.n = engine.n_cylinders
        self._vd = np.pi / 4 * engine.bore_m**2 * engine.stroke_m  # m³, swept volume per cylinder
        _, angles = firing_sequence(engine)
        iv = np.diff(np.concatenate((angles, [angles[0] + engine.cycle_deg])))
        self._expected_before = np.roll(iv, 1)  # expected interval *before* each position
        # every firing the same angle apart: the cylinders' fired levels read alike
        self._even = bool(np.ptp(iv) < 1.0)
        # events of look-ahead: the cylinder's next lookahead_cycles events, and the other
        # cylinders' events around the last of them (its cross score reads their median); an
        # event decided before those arrived would depend on where the stream was cut
        self._ahead = self.s.lookahead_cycles * self.n + self.n - 1
        self._back = max(2 * self.n, self._ahead)  # events of history kept in the buffer
        self._z = float(self.s.threshold if self.s.threshold is not None else self.s.z_threshold)
        self._cyl = [CylinderState(self.s.history_cycles, self.s.spread_events,
                                   self.s.pattern_events) for _ in range(self.n)]
        self._raw = np.zeros(0, dtype=RAW_EVENT_DTYPE)
        self._thr_in = np.zeros(0)
        self._done_upto: int | None = None  # global index of the next event to decide
        self._last_closed_t = -np.inf
        self._prev_at = np.nan  # rise angle of the last decided event (for intervals)
        self._prev_index = -2
        self._detail: list[np.ndarray] = []
        self._ring_from, self._ring_cyl, self._ring_z = -(10**18), -1, 0.0  # last misfire
        self._recent_z: deque[float] = deque(maxlen=max(8 * self.n, 16))  # z of recent fired events
        self._last_flag = -(10**18)  # global index of the last flagged event

    # -- streaming ------------------------------------------------------------------------------
    def push(self, raw: np.ndarray, throttle: np.ndarray | None = None) -> np.ndarray:
        raw = np.asarray(raw)
        if raw.dtype != RAW_EVENT_DTYPE:
            raise InputError(f"raw events must have RAW_EVENT_DTYPE, got dtype {raw.dtype}")
        thr = np.full(raw.size, np.nan) if throttle is None else np.asarray(throttle, float)
        if thr.shape != raw.shape:
            raise InputError(
                f"throttle has shape {thr.shape}, expected {raw.shape} (one per event)"
            )
        if raw.size and self._raw.size and raw["index"][0] != self._raw["index"][-1] + 1:
            raise InputError(
                f"raw event {raw['index'][0]} does not follow event {self._raw['index'][-1]}"
            )
        self._raw = np.concatenate((self._raw, raw))
        self._thr_in = np.concatenate((self._thr_in, thr))
        if self._done_upto is None and self._raw.size:
            self._done_upto = int(self._raw["index"][0])
        return self._decide(final=False)

    def finish(self) -> np.ndarray:
        return self._decide(final=True)

    def take_detail(self) -> np.ndarray:
        """Detail rows of the events returned since the last call, in the same order."""
        out = np.concatenate(self._detail) if self._detail else empty_detail(0)
        self._detail = []
        return out

    def report(self) -> dict:
        """Run-level findings: dead and unusable cylinders with reasons, depth calibration.

        Returns
        -------
        dict with ``unusable`` ({cylinder: reason}), ``dead`` ({cylinder: first time seen, s}),
        ``depth_calibrated`` ({cylinder: bool}) and ``notes`` (one line each).
        """
        unusable = {c + 1: st.unusable_reason for c, st in enumerate(self._cyl)
                    if st.unusable_reason}
        dead = {c + 1: st.first_dead for c, st in enumerate(self._cyl) if st.first_dead is not None}
        k = self.s.depth_min_count
        calibrated = {c + 1: any(len(v) >= k for v in (*st.motored.values(),
                                                        *st.misfire_dev.values()))
                      for c, st in enumerate(self._cyl)}
        notes = [f"cylinder {c}: events unusable, {why}" for c, why in unusable.items()]
        # "dead" is what the score shows: a deep partial burn (under about half the charge
        # burning) scores like no combustion on the energy step, so the note does not claim more
        notes += [f"cylinder {c}: dead spell from t = {t:.2f} s (no combustion, or too little to "
                  "tell from none): every event of it counted as misfire" for c, t in dead.items()]
        notes += [f"cylinder {c + 1}: a run of partial burns from t = {st.first_weak:.2f} s (part "
                  "of the charge burning: counted apart from misfires, as partial)"
                  for c, st in enumerate(self._cyl) if st.first_weak is not None]
        if not all(calibrated.values()):
            which = ", ".join(str(c) for c, ok in calibrated.items() if not ok)
            notes.append(f"misfire depth not calibrated on cylinder(s) {which} (no fuel cut and "
                         "no clear misfire seen): partial burns are not told from misfires there")
        return {"unusable": unusable, "dead": dead, "depth_calibrated": calibrated,
                "notes": notes}

    def _decide(self, *, final: bool) -> np.ndarray:
        if self._done_upto is None or not self._raw.size:
            return empty_events(0)
        first = int(self._raw["index"][0])
        last = int(self._raw["index"][-1])
        ready_hi = last + 1 if final else last + 1 - self._ahead
        out = empty_events(0)
        if self._done_upto < ready_hi:
            out = self._segment(self._done_upto - first, ready_hi - first)
            self._done_upto = ready_hi
        keep_from = max(self._done_upto - first - self._back, 0)
        self._raw = self._raw[keep_from:]
        self._thr_in = self._thr_in[keep_from:]
        return out

    # -- one run of events ------------------------------------------------------------------------
    def _segment(self, i0: int, i1: int) -> np.ndarray:
        s, raw = self.s, self._raw
        ev = raw[i0:i1]
        out = empty_events(i1 - i0)
        detail = empty_detail(i1 - i0)
        for name in ("t", "cycle", "cylinder", "rpm"):
            out[name] = ev[name]
        out["throttle"] = self._thr_in[i0:i1]
        w_all = np.where(raw["usable"], raw[s.feature], np.nan)
        # the indicated-work estimate (in bar of swept volume) tells a fuel cut and gives each
        # event's share of the engine's work; the decision itself is on ``s.feature``
        work_all = np.where(raw["usable"], raw["work"], np.nan)
        hi = min(i1 + self._ahead, raw.size)
        others = other_cylinders_level(w_all, i0, hi, self.n)
        base = typical_work(work_all, i0, i1, self.n)
        y_all = np.full(raw.size, np.nan)
        y_all[i0:hi] = w_all[i0:hi] - others
        with np.errstate(invalid="ignore", divide="ignore"):
            out["contribution"] = work_all[i0:i1] / base
        fc_sure, fc_maybe, self._last_closed_t = fuel_cut_flags(
            ev, work_all, self._thr_in, i0, i1, self.n, self._vd, s, self._last_closed_t)
        self._sequential(i0, i1, w_all, y_all, others, fc_sure, fc_maybe, out, detail)
        self._intervals(out, ev)
        self._detail.append(detail)
        return out

    def _sequential(self, i0, i1, w_all, y_all, others, fc_sure, fc_maybe, out, detail) -> None:
        """Decide events i0..i1 one by one (each updates the cylinder state the next ones use)."""
        s, n, z_thr = self.s, self.n, self._z
        # plain Python lists: the loop reads single values, far cheaper than numpy scalars
        cyl0 = (self._raw["cylinder"].astype(np.int64) - 1).tolist()
        rpm = self._raw["rpm"].tolist()
        gidx = self._raw["index"].tolist()
        size = w_all.size
        w_all, y_all, others = w_all.tolist(), y_all.tolist(), others.tolist()
        fc_sure, fc_maybe = fc_sure.tolist(), fc_maybe.tolist()
        times, shares = out["t"].tolist(), out["contribution"].tolist()
        metric = np.full(i1 - i0, np.nan)
        conf = np.zeros(i1 - i0)
        verdict = np.full(i1 - i0, UNUSABLE, dtype=np.int8)
        cause = np.zeros(i1 - i0, dtype=np.uint8)
        depth = np.full(i1 - i0, np.nan)
        for k in range(i0, i1):
            o = k - i0
            x = w_all[k]
            c = cyl0[k]
            st = self._cyl[c]
            if x != x:
                cause[o] = CAUSE_CRANK
                continue
            y = y_all[k]
            ahead = [k + n * a for a in range(1, s.lookahead_cycles + 1) if k + n * a < size]
            ax = [w_all[j] for j in ahead if w_all[j] == w_all[j]]
            ay = [y_all[j] for j in ahead if y_all[j] == y_all[j]]
            sd, sx = st.spreads()
            if st.stale and not fc_sure[o]:
                st.restart_baseline(s.warmup_cycles)
            ready = len(st.dev) >= s.warmup_cycles and st.rewarm == 0
            hx_med = median(st.hx) if st.hx else float("nan")
            level = max(abs(hx_med) if st.hx else abs(x), abs(others[o])
                        if others[o] == others[o] else 0.0)
            floor = s.spread_floor * level + 1e-12
            sd = max(sd, floor) if sd == sd else floor
            sx = max(sx, floor) if sx == sx else floor
            screen = hx_med - z_thr * sd if ready else None
            b = st.baseline(ax, screen_below=screen)
            d = x - b
            z = -d / sd
            screen_y = median(st.hy) - z_thr * sx if ready and st.hy else None
            by = st.cross_baseline(ay, screen_below=screen_y) if y == y else float("nan")
            dx = y - by
            zx = -dx / sx
            # a rough road or a ringing driveline scatters every event around: then the
            # threshold rises with the recent scatter (about their median: a baseline lagging a
            # throttle change shifts every score the same way, and is no disturbance)
            calm = (robust_spread(self._recent_z) / s.local_scatter
                    if len(self._recent_z) >= 4 else 0.0)
            # within two cycles of an event lost to bad crank data the loss balance of the
            # window work is patched (dsp.fluctuation): the score is less sure there
            near_gap = any(w_all[j] != w_all[j]
                           for j in range(max(k - 2 * n, 0), min(k + 2 * n + 1, size)))
            margin = s.gap_margin if near_gap else 1.0
            cand = (ready and z > z_thr * max(margin, calm)
                    and (n == 1 or not zx == zx or zx > s.cross_threshold))
            gi = gidx[k]
            if cand and c != self._ring_cyl and gi - self._ring_from <= 2 * n:
                # the driveline rings for a few events after a misfire: another cylinder's
                # event then must stand out by a share of that misfire's own score too
                cand = z > s.ring_share * self._ring_z
            share = shares[o]
            cell = int(rpm[k] // 1000.0) if rpm[k] == rpm[k] else -1
            # where a depth scale exists, an event clearly short of a whole misfire is a
            # partial burn: a run of them is a weak cylinder, never a dead spell
            scale_here = st.depth_scale(cell, b, min_count=s.depth_min_count)
            # the own-misfire scale matters to flagged events only (a run of them, a partial
            # verdict): not looked up on every event
            own = (st.own_misfire_scale(cell, rpm[k], min_count=s.depth_min_count,
                                        max_spread=s.own_scale_spread, rpm_share=s.own_rpm_share,
                                        min_z=2.0 * z_thr) if cand else float("nan"))
            own_partial = own == own and -d < s.partial_depth * own
            partial_like = bool(scale_here == scale_here and -d / scale_here < s.partial_depth
                                or own_partial)
            dead = self._dead(c, x, share, cand, times[o], partial_like=partial_like)
            metric[o] = z if ready else np.nan
            if fc_sure[o] or (fc_maybe[o] and (cand or dead)):
                verdict[o] = FUEL_CUT
                st.stale = True
                st.add_motored(cell, x, s.depth_history)
                conf[o] = 1.0
                continue
            st.add_recent(x, share)
            st.flags.append(bool(cand or dead))
            why = None if dead else st.pattern_implausible(min_events=s.pattern_events)
            if why is not None:
                st.unusable_reason = why
                verdict[o], cause[o] = UNUSABLE, CAUSE_IMPLAUSIBLE
                continue
            depth[o] = -d / scale_here if scale_here == scale_here else np.nan
            if dead:
                verdict[o], cause[o], conf[o] = MISFIRE, CAUSE_DEAD, 1.0
                # the note names spells whose events were counted (one inside a fuel cut was not)
                st.first_dead = times[o] if st.first_dead is None else st.first_dead
                self._last_flag = gi
                if ready and z > z_thr:
                    st.add_misfire(cell, -d, s.depth_history, rpm[k], z)
            elif cand and len(st.run) > s.dead_run and st.ever_healthy and not partial_like:
                # a long run of low scores whose share of the engine's work did not collapse is
                # no dead spell but a drift of this cylinder's level (a driveline mode moving with
                # speed): the baseline follows it instead of locking the cylinder into misfires;
                # not so a run clearly short of a whole misfire on a trusted scale (a weak
                # cylinder burning part of its charge stays partial, never learnt as its level)
                verdict[o] = FIRED
                st.accept(x, y, d, dx)
            elif cand:
                self._ring_from, self._ring_cyl, self._ring_z = gi, c, z
                self._last_flag = gi
                # a partial burn only where it is clearly short of a whole misfire, by depth and
                # by a gap in robust sigma, on an offset-free scale: this cylinder's motored
                # level (a fuel cut in this rpm cell) or its own clear misfires where they agree
                # (misfires that scatter, from 0.4 to 1.4 of their median at high speed and
                # light load, give none): a misfire called partial is a missed misfire
                scale = -d / depth[o] if depth[o] == depth[o] and depth[o] > 0 else 0.0
                calibrated_here = len(st.motored.get(cell, ())) >= s.depth_min_count
                partial = (calibrated_here and depth[o] < s.partial_depth
                           and (1.0 - depth[o]) * scale > s.partial_gap * sd
                           or own_partial and own + d > s.own_partial_gap * sd)
                verdict[o] = PARTIAL if partial else MISFIRE
                conf[o] = min(1.0, (z - z_thr) / z_thr + 0.5)
                if not partial:
                    st.add_misfire(cell, -d, s.depth_history, rpm[k], z)
                self._weak_spell(c, partial, times[o])
            elif ready:
                verdict[o] = FIRED
                self._weak_spell(c, False, times[o])
                if gi - self._last_flag > self.n:
                    # the events just after a misfire rebound (the next cylinder starts slower):
                    # that is the misfire's own trace, no rough road
                    self._recent_z.append(z)
                conf[o] = min(1.0, (z_thr - z) / z_thr)
                st.accept(x, y, d, dx)
                st.ever_healthy = True
                if share == share:
                    st.shares.append(share)
            else:
                cause[o] = CAUSE_WARMUP
                st.accept(x, y, d, dx)
                st.rewarm = max(st.rewarm - 1, 0)
        out["metric"] = metric
        out["threshold"] = z_thr
        out["verdict"] = verdict
        out["confidence"] = np.clip(conf, 0.0, 1.0)
        detail["depth"] = depth
        detail["cause"] = cause

    def _dead(self, c: int, x: float, contrib: float, cand: bool, t: float, *,
              partial_like: bool = False) -> bool:
        """Cylinder c is in a dead spell: no combustion for a while, from the start or mid-ride.

        Mid-ride, a run of ``dead_run`` misfires in a row (the last one not ``partial_like``:
        short of a whole misfire on a calibrated depth scale) starts a spell when the cylinder's
        share of the engine's work (``contribution``) collapsed by ``dead_share_drop``, or, on an
        even-firing engine, when the run reads steadily below every other cylinder's level. A
        cylinder that never fired has no level before: it is told by a metric far below the
        others' (under ``dead_ratio`` of their level and below every one of them) without their
        combustion scatter, and on an uneven-firing engine a share of the engine's work below
        ``dead_start_share`` (there the cylinders' levels differ by geometry alone).
        A spell lasts while the cylinder reads below halfway between where it started and where
        fired cylinders read (the share where the share started it, else the metric).
        """
        st = self._cyl[c]
        if self.n < 2:
            return False
        st.run = st.run + [contrib] if cand else []
        st.run_x = st.run_x + [x] if cand else []
        lv = [o.level for i, o in enumerate(self._cyl) if i != c and len(o.recent) >= 4]
        lv_o = median(lv) if lv else float("nan")
        lim = self.s.dead_ratio * lv_o
        if st.dead_since is not None:
            if st.spell_mid == st.spell_mid:
                dead = contrib == contrib and contrib < st.spell_mid
            elif st.spell_mid_x == st.spell_mid_x:
                dead = x < st.spell_mid_x
            else:  # dead from the start (uneven engine): while it stays far below the others
                dead = lv_o > 0 and x < lim
        else:
            dead = st.ever_healthy and (
                len(st.run) >= self.s.dead_run and not partial_like
                and (self._share_collapsed(c) or self._reads_dead(c, st.run_x, lv)))
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
            self._others_relearn(c)
        return dead

    def _level_dead(self, c: int, x: float, lv: list[float], lim: float) -> bool:
        """The cylinder's recent level reads dead against the others' (see :meth:`_dead`);
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

    def _weak_spell(self, c: int, partial: bool, t: float) -> None:
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

    def _intervals(self, out: np.ndarray, ev: np.ndarray) -> None:
        pos_in_seq = np.mod(ev["index"], self.n)
        out["expected_interval_deg"] = self._expected_before[pos_in_seq]
        at = np.where(out["verdict"] == FIRED, ev["theta"] + ev["rise_deg"], np.nan)
        if not ev.size:
            return
        prev_at = np.concatenate(([self._prev_at], at[:-1]))
        prev_idx = np.concatenate(([self._prev_index], ev["index"][:-1]))
        out["interval_deg"] = np.where(prev_idx == ev["index"] - 1, at - prev_at, np.nan)
        self._prev_at = float(at[-1])
        self._prev_index = int(ev["index"][-1])


def detect_misfires(
    raw: np.ndarray,
    engine: Engine,
    *,
    throttle: np.ndarray | None = None,
    settings: MisfireSettings | None = None,
) -> np.ndarray:
    """Whole-run version of :class:`MisfireDetector`: the same events, identical numbers.

    Parameters
    ----------
    raw : ndarray of :data:`dsp.fluctuation.RAW_EVENT_DTYPE`, in event order
    engine : Engine
    throttle : (n,) float, %, keyword-only
        Throttle at each event (NaN or None when unknown).
    settings : MisfireSettings, keyword-only

    Returns
    -------
    events : ndarray of :data:`dsp.events.EVENT_DTYPE`
    """
    det = MisfireDetector(engine, settings=settings)
    return np.concatenate((det.push(raw, throttle), det.finish()))


__all__ = ["MisfireSettings", "MisfireDetector", "detect_misfires"]
