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
* a cylinder is dead (every event ``MISFIRE``, its baseline frozen, never adapted to it) in a
  dead spell, from the first cycles of a ride or mid-ride (:mod:`dsp.spells` says when);
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
from typing import NamedTuple

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
from crankbeat.dsp.spells import SpellWatch
from crankbeat.errors import InputError


class _Pass(NamedTuple):
    """One pass of the decision over a run of events: the buffer's columns as Python lists."""

    cyl0: list  # 0-based cylinder of every buffered event
    rpm: list
    gidx: list  # global event index
    w: list  # the decision's feature, NaN where unusable
    y: list  # feature minus the other cylinders' level
    others: list  # the other cylinders' level, from the first event decided
    fc_sure: list
    fc_maybe: list
    times: list  # s, from the first event decided
    shares: list  # share of the engine's work, from the first event decided
    size: int


class _Score(NamedTuple):
    """An event's scores (robust sigma) and the numbers behind them (J)."""

    ready: bool  # the cylinder's statistics are filled
    b: float  # own baseline
    d: float  # deviation from it
    y: float
    dx: float  # deviation from the cross baseline
    z: float
    sd: float  # own robust spread, floored
    cand: bool  # flagged (before the dead-spell and fuel-cut rules)


class _Verdicts:
    """Output columns of one pass."""

    def __init__(self, n: int) -> None:
        self.metric = np.full(n, np.nan)
        self.conf = np.zeros(n)
        self.verdict = np.full(n, UNUSABLE, dtype=np.int8)
        self.cause = np.zeros(n, dtype=np.uint8)
        self.depth = np.full(n, np.nan)


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
        self._spells = SpellWatch(self._cyl, self.s, even=self._even, z_threshold=self._z)

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
        # plain Python lists: the loop reads single values, far cheaper than numpy scalars
        run = _Pass(cyl0=(self._raw["cylinder"].astype(np.int64) - 1).tolist(),
                    rpm=self._raw["rpm"].tolist(), gidx=self._raw["index"].tolist(),
                    w=w_all.tolist(), y=y_all.tolist(), others=others.tolist(),
                    fc_sure=fc_sure.tolist(), fc_maybe=fc_maybe.tolist(), times=out["t"].tolist(),
                    shares=out["contribution"].tolist(), size=w_all.size)
        res = _Verdicts(i1 - i0)
        for k in range(i0, i1):
            o = k - i0
            if run.w[k] != run.w[k]:
                res.cause[o] = CAUSE_CRANK
                continue
            self._judge(k, o, self._score(k, o, run), run, res)
        out["metric"] = res.metric
        out["threshold"] = self._z
        out["verdict"] = res.verdict
        out["confidence"] = np.clip(res.conf, 0.0, 1.0)
        detail["depth"] = res.depth
        detail["cause"] = res.cause

    def _score(self, k: int, o: int, run: _Pass) -> _Score:
        """Event k's scores against its cylinder's own baseline and against the others'."""
        s, n, z_thr = self.s, self.n, self._z
        x, y, c = run.w[k], run.y[k], run.cyl0[k]
        st = self._cyl[c]
        ahead = [k + n * a for a in range(1, s.lookahead_cycles + 1) if k + n * a < run.size]
        ax = [run.w[j] for j in ahead if run.w[j] == run.w[j]]
        ay = [run.y[j] for j in ahead if run.y[j] == run.y[j]]
        sd, sx = st.spreads()
        if st.stale and not run.fc_sure[o]:
            st.restart_baseline(s.warmup_cycles)
        ready = len(st.dev) >= s.warmup_cycles and st.rewarm == 0
        hx_med = median(st.hx) if st.hx else float("nan")
        oth = run.others[o]
        level = max(abs(hx_med) if st.hx else abs(x), abs(oth) if oth == oth else 0.0)
        floor = s.spread_floor * level + 1e-12
        sd = max(sd, floor) if sd == sd else floor
        sx = max(sx, floor) if sx == sx else floor
        b = st.baseline(ax, screen_below=hx_med - z_thr * sd if ready else None)
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
        near_gap = any(run.w[j] != run.w[j]
                       for j in range(max(k - 2 * n, 0), min(k + 2 * n + 1, run.size)))
        margin = s.gap_margin if near_gap else 1.0
        cand = (ready and z > z_thr * max(margin, calm)
                and (n == 1 or not zx == zx or zx > s.cross_threshold))
        if cand and c != self._ring_cyl and run.gidx[k] - self._ring_from <= 2 * n:
            # the driveline rings for a few events after a misfire: another cylinder's
            # event then must stand out by a share of that misfire's own score too
            cand = z > s.ring_share * self._ring_z
        return _Score(ready, b, d, y, dx, z, sd, cand)

    def _judge(self, k: int, o: int, sc: _Score, run: _Pass, res: _Verdicts) -> None:
        """Event k's verdict from its scores; updates its cylinder's state and the spells."""
        s, z_thr = self.s, self._z
        c, x, rpm, t, share = run.cyl0[k], run.w[k], run.rpm[k], run.times[o], run.shares[o]
        st = self._cyl[c]
        cell = int(rpm // 1000.0) if rpm == rpm else -1
        # where a depth scale exists, an event clearly short of a whole misfire is a
        # partial burn: a run of them is a weak cylinder, never a dead spell
        scale_here = st.depth_scale(cell, sc.b, min_count=s.depth_min_count)
        # the own-misfire scale matters to flagged events only (a run of them, a partial
        # verdict): not looked up on every event
        own = (st.own_misfire_scale(cell, rpm, min_count=s.depth_min_count,
                                    max_spread=s.own_scale_spread, rpm_share=s.own_rpm_share,
                                    min_z=2.0 * z_thr) if sc.cand else float("nan"))
        own_partial = own == own and -sc.d < s.partial_depth * own
        partial_like = bool(scale_here == scale_here and -sc.d / scale_here < s.partial_depth
                            or own_partial)
        dead = self._spells.dead(c, x, share, sc.cand, t, partial_like=partial_like, z=sc.z)
        res.metric[o] = sc.z if sc.ready else np.nan
        if run.fc_sure[o] or (run.fc_maybe[o] and (sc.cand or dead)):
            res.verdict[o], res.conf[o] = FUEL_CUT, 1.0
            st.stale = True
            st.add_motored(cell, x, s.depth_history)
            return
        st.add_recent(x, share)
        st.flags.append(bool(sc.cand or dead))
        why = None if dead else st.pattern_implausible(min_events=s.pattern_events)
        if why is not None:
            st.unusable_reason = why
            res.verdict[o], res.cause[o] = UNUSABLE, CAUSE_IMPLAUSIBLE
            return
        res.depth[o] = -sc.d / scale_here if scale_here == scale_here else np.nan
        gi = run.gidx[k]
        if dead:
            res.verdict[o], res.cause[o], res.conf[o] = MISFIRE, CAUSE_DEAD, 1.0
            # the note names spells whose events were counted (one inside a fuel cut was not)
            st.first_dead = t if st.first_dead is None else st.first_dead
            self._last_flag = gi
            if sc.ready and sc.z > z_thr:
                st.add_misfire(cell, -sc.d, s.depth_history, rpm, sc.z)
        elif sc.cand and len(st.run) > s.dead_run and st.ever_healthy and not partial_like:
            # a long run of low scores whose share of the engine's work did not collapse is
            # no dead spell but a drift of this cylinder's level (a driveline mode moving with
            # speed): the baseline follows it instead of locking the cylinder into misfires;
            # not so a run clearly short of a whole misfire on a trusted scale (a weak
            # cylinder burning part of its charge stays partial, never learnt as its level)
            res.verdict[o] = FIRED
            st.accept(x, sc.y, sc.d, sc.dx)
        elif sc.cand:
            self._flagged(c, o, cell, sc, own if own_partial else float("nan"), rpm, t, gi, res)
        elif sc.ready:
            res.verdict[o] = FIRED
            self._spells.weak(c, False, t)
            if gi - self._last_flag > self.n:
                # the events just after a misfire rebound (the next cylinder starts slower):
                # that is the misfire's own trace, no rough road
                self._recent_z.append(sc.z)
            res.conf[o] = min(1.0, (z_thr - sc.z) / z_thr)
            st.accept(x, sc.y, sc.d, sc.dx)
            st.ever_healthy = True
            if share == share:
                st.shares.append(share)
        else:
            res.cause[o] = CAUSE_WARMUP
            st.accept(x, sc.y, sc.d, sc.dx)
            st.rewarm = max(st.rewarm - 1, 0)

    def _flagged(self, c: int, o: int, cell: int, sc: _Score, own: float, rpm: float, t: float,
                 gi: int, res: _Verdicts) -> None:
        """A flagged event: misfire, or partial burn where an offset-free depth scale says so.

        ``own`` is the median of the cylinder's own clear misfires where the event is shallower
        than ``partial_depth`` of it (NaN otherwise)."""
        s, z_thr, st = self.s, self._z, self._cyl[c]
        self._ring_from, self._ring_cyl, self._ring_z = gi, c, sc.z
        self._last_flag = gi
        # a partial burn only where it is clearly short of a whole misfire, by depth and
        # by a gap in robust sigma, on an offset-free scale: this cylinder's motored
        # level (a fuel cut in this rpm cell) or its own clear misfires where they agree
        # (misfires that scatter, from 0.4 to 1.4 of their median at high speed and
        # light load, give none): a misfire called partial is a missed misfire
        depth = res.depth[o]
        scale = -sc.d / depth if depth == depth and depth > 0 else 0.0
        calibrated_here = len(st.motored.get(cell, ())) >= s.depth_min_count
        partial = (calibrated_here and depth < s.partial_depth
                   and (1.0 - depth) * scale > s.partial_gap * sc.sd
                   or own == own and own + sc.d > s.own_partial_gap * sc.sd)
        res.verdict[o] = PARTIAL if partial else MISFIRE
        res.conf[o] = min(1.0, (sc.z - z_thr) / z_thr + 0.5)
        if not partial:
            st.add_misfire(cell, -sc.d, s.depth_history, rpm, sc.z)
        self._spells.weak(c, partial, t)

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
