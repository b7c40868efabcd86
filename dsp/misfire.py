"""Misfire decision per firing event, with thresholds learnt from the run itself.

Metric
------
``metric_k = 1 − W_k / ref_k``: 0 for a typical fired event, near 1 for a complete misfire
(the window keeps only the compression work that comes back, a small fraction). ``W_k`` is the
indicated-work estimate of :mod:`dsp.fluctuation`. ``ref_k`` is what this cylinder should have
delivered *now*: the mean of the upper half of the ``4n`` events around it (two cycles before,
two after), times this cylinder's factor (its typical share, learnt per cell). Taking the
neighbours tracks load and rpm changes at once (a throttle snap changes every cylinder
together), and taking their upper half keeps a neighbouring misfire, or a burst on one cylinder,
out of the reference. A disturbance that hits all cylinders (a road bump through the driveline)
lowers the reference with the event and does not make a misfire; a misfire is low against its
neighbours on both sides (the second-difference idea of the classic monitors).

Decision
--------
``MISFIRE`` when ``metric > threshold``. The threshold is learnt per cylinder and per cell of
rpm and load (load from the reference work itself, in bar of the swept volume, so it needs no
throttle signal): the fired events' median plus the larger of ``spread_k`` robust standard
deviations (MAD) and ``misfire_share`` of the way to a complete misfire (1), clipped to
``[threshold_min, threshold_max]``; a cell not learnt yet uses its cylinder's pooled threshold,
and ``default_threshold`` before that. Statistics are updated per block of events counted from
the run's first event (16, 32, 64, then ``block``), and every event uses the statistics of the
blocks before its own: the decision is causal with a look-ahead of two cycles plus the window's,
and it does not depend on how the stream was chunked. The first ``warmup_events`` events get no
decision (the monitor's enable condition). After a misfire the driveline rings for a few events:
during ``holdoff_events`` events after one, a misfire on another cylinder must clear the
threshold by ``holdoff_margin`` of the way to 1 (a burst on one cylinder is not held off).
``z_local`` (off by default) also asks a misfire to stand out of the current spread of its
neighbours.

``FUEL_CUT`` when the rpm is at least ``fuel_cut_min_rpm`` and either the throttle is closed (or
unknown) and no cylinder around fires, or the throttle is (or was within ``fuel_cut_hold_s``)
seen closed and the event has no combustion: the ECU's overrun cut, gear changes. ``UNUSABLE``
when the crank data did not allow a metric, and during the warm-up.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import FIRED, FUEL_CUT, MISFIRE, UNUSABLE, empty_events
from crankbeat.dsp.fluctuation import RAW_EVENT_DTYPE
from crankbeat.dsp.layout import firing_sequence
from crankbeat.errors import InputError


@dataclass(frozen=True)
class MisfireSettings:
    """Options of the misfire decision (the rig file may override any of them).

    Attributes
    ----------
    threshold : float or None
        A fixed threshold on the metric; None = learn it from the run.
    default_threshold : float
        Threshold used before a cell has ``min_cell_events`` fired events.
    threshold_min, threshold_max : float
        Bounds of a learnt threshold.
    spread_k : float
        Robust standard deviations of the fired metric above its median.
    misfire_share : float
        The threshold lies at least this share of the way from the fired median to a complete
        misfire (metric 1): a partial burn that still delivers more than about this share of
        the work counts as fired (a weak cylinder, seen in the contribution), not as a misfire.
    min_cell_events, history : int
        Fired events a cell needs before its own threshold is used; events it keeps.
    rpm_bin : float
        Width of the rpm cells, rpm.
    load_edges_bar : tuple of float
        Cell edges of the load, as the reference window work over the swept volume, bar.
    closed_throttle_pct, fuel_cut_min_rpm, fuel_cut_work_bar : float
        Fuel-cut recognition: throttle at or below, rpm at or above, and mean window work of the
        events around below this (bar of swept volume).
    fuel_cut_hold_s : float
        For this long after the throttle was last seen closed (and within two cycles before
        it), an event without combustion is still the ECU's cut (gear changes, cut exit).
    holdoff_events : int or None
        Events after a misfire during which a further misfire on another cylinder must clear
        the threshold by ``holdoff_margin`` of the way to 1 (None = 2 cycles).
    holdoff_margin : float
    block : int
        Events per statistics update.
    warmup_events : int
        Events at the start of a run that get no decision (UNUSABLE): the monitor's enable
        condition, until the first statistics block is in.
    learn_below : float
        Events with a metric below this feed the fired statistics even if they were called
        misfires (so that a steady weak pattern is learnt, while complete misfires are not).
    z_local : float
        A misfire must exceed this many relative standard deviations of the neighbours that
        form its reference (rough road, ringing driveline).
    min_misfires, misfire_history : int
        Clear misfires a cell needs before their typical metric is kept; misfires kept.
    """

    threshold: float | None = None
    default_threshold: float = 0.6
    threshold_min: float = 0.35
    threshold_max: float = 0.85
    spread_k: float = 4.5
    misfire_share: float = 0.6
    min_cell_events: int = 24
    history: int = 96
    rpm_bin: float = 1000.0
    load_edges_bar: tuple[float, ...] = (1.5, 3.0, 5.0, 8.0)
    closed_throttle_pct: float = 2.0
    fuel_cut_min_rpm: float = 1600.0
    fuel_cut_work_bar: float = 1.0
    fuel_cut_hold_s: float = 0.15
    holdoff_events: int | None = None
    holdoff_margin: float = 0.15
    block: int = 128
    min_misfires: int = 5
    z_local: float = 0.0
    learn_below: float = 0.8
    warmup_events: int = 16
    misfire_history: int = 16

    def __post_init__(self) -> None:
        if self.threshold is not None and not 0 < self.threshold < 2:
            raise InputError(f"misfire threshold must be in (0, 2), got {self.threshold!r}")
        if not 0 < self.threshold_min <= self.default_threshold <= self.threshold_max:
            raise InputError(
                "need 0 < threshold_min <= default_threshold <= threshold_max, got "
                f"{self.threshold_min!r}, {self.default_threshold!r}, {self.threshold_max!r}"
            )
        for name in ("min_cell_events", "history", "block"):
            if int(getattr(self, name)) < 1:
                raise InputError(f"{name} must be >= 1, got {getattr(self, name)!r}")
        if self.rpm_bin <= 0:
            raise InputError(f"rpm_bin must be > 0, got {self.rpm_bin!r}")


def _fmedian(x: np.ndarray) -> float:
    """Median of the finite values (NaN when there are none)."""
    v = x[np.isfinite(x)]
    return float(np.median(v)) if v.size else float("nan")


class _Cells:
    """Per (cylinder, rpm cell, load cell) history of fired events: metric and work ratio."""

    def __init__(self, n_cyl: int, settings: MisfireSettings):
        self.s = settings
        self.n_load = len(settings.load_edges_bar) + 1
        self.n_rpm = 24
        shape = (n_cyl, self.n_rpm, self.n_load)
        self.metric = np.full(shape + (settings.history,), np.nan)
        self.ratio = np.full(shape + (settings.history,), np.nan)
        self.fill = np.zeros(shape, dtype=np.int64)  # values ever written
        self.thr = np.full(shape, settings.default_threshold)
        self.sigma = np.full(shape, 0.1)
        self.med = np.zeros(shape)
        self.mis = np.ones(shape)
        self.mis_metric = np.full(shape + (settings.misfire_history,), np.nan)
        self.mis_fill = np.zeros(shape, dtype=np.int64)
        self.factor = np.ones(shape)
        # per-cylinder factor over all cells, for cells with too little data
        self.cyl_ratio = np.full((n_cyl, settings.history), np.nan)
        self.cyl_fill = np.zeros(n_cyl, dtype=np.int64)
        self.cyl_factor = np.ones(n_cyl)
        # per-cylinder metric spread over all cells: the threshold of cells not learnt yet
        self.cyl_metric = np.full((n_cyl, settings.history), np.nan)
        self.cyl_thr = np.full(n_cyl, settings.default_threshold)
        self.cyl_sigma = np.full(n_cyl, 0.1)

    def cell(self, rpm: np.ndarray, load_bar: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = np.clip(np.nan_to_num(rpm / self.s.rpm_bin), 0, self.n_rpm - 1).astype(np.int64)
        ld = np.searchsorted(np.asarray(self.s.load_edges_bar), np.nan_to_num(load_bar))
        return r, ld.astype(np.int64)

    def update(self, cyl0, rc, lc, metric, ratio) -> None:
        h = self.s.history
        for c in np.unique(cyl0):
            sel = cyl0 == c
            vals = ratio[sel]
            k = self.cyl_fill[c]
            pos = (k + np.arange(vals.size)) % h
            self.cyl_ratio[c, pos[-h:]] = vals[-h:]
            self.cyl_fill[c] = k + vals.size
            self.cyl_factor[c] = float(_fmedian(self.cyl_ratio[c]))
            self.cyl_metric[c, pos[-h:]] = metric[sel][-h:]
            hist = self.cyl_metric[c]
            if np.isfinite(hist).sum() >= max(8, self.s.min_cell_events // 3):
                med = float(_fmedian(hist))
                sig = max(1.4826 * float(_fmedian(np.abs(hist - med))), 0.01)
                thr = med + max(self.s.spread_k * sig, self.s.misfire_share * (1.0 - med))
                self.cyl_sigma[c] = sig
                self.cyl_thr[c] = float(
                    np.clip(thr, max(self.s.threshold_min, self.s.default_threshold),
                            self.s.threshold_max)
                )
        key = (cyl0 * self.n_rpm + rc) * self.n_load + lc
        for u in np.unique(key):
            sel = key == u
            c, rest = divmod(int(u), self.n_rpm * self.n_load)
            r, ld = divmod(rest, self.n_load)
            k = self.fill[c, r, ld]
            m = metric[sel][-h:]
            q = ratio[sel][-h:]
            pos = (k + np.arange(m.size)) % h
            self.metric[c, r, ld, pos] = m
            self.ratio[c, r, ld, pos] = q
            self.fill[c, r, ld] = k + int(sel.sum())
            if self.fill[c, r, ld] < self.s.min_cell_events:
                continue
            self.factor[c, r, ld] = float(_fmedian(self.ratio[c, r, ld]))
            hist = self.metric[c, r, ld]
            if np.isfinite(hist).sum() >= 8:
                med = float(_fmedian(hist))
                sig = 1.4826 * float(_fmedian(np.abs(hist - med)))
                self.med[c, r, ld] = med
                self.sigma[c, r, ld] = max(sig, 0.01)
                self._threshold(c, r, ld)

    def update_misfires(self, cyl0, rc, lc, metric) -> None:
        """Keep the metric of clear misfires per cell (for the hold-off and reports)."""
        hm = self.s.misfire_history
        key = (cyl0 * self.n_rpm + rc) * self.n_load + lc
        for u in np.unique(key):
            sel = key == u
            c, rest = divmod(int(u), self.n_rpm * self.n_load)
            r, ld = divmod(rest, self.n_load)
            k = self.mis_fill[c, r, ld]
            m = metric[sel][-hm:]
            pos = (k + np.arange(m.size)) % hm
            self.mis_metric[c, r, ld, pos] = m
            self.mis_fill[c, r, ld] = k + int(sel.sum())
            self._threshold(c, r, ld)

    def _threshold(self, c: int, r: int, ld: int) -> None:
        s = self.s
        if self.fill[c, r, ld] < s.min_cell_events:
            return
        med, sig = self.med[c, r, ld], self.sigma[c, r, ld]
        if self.mis_fill[c, r, ld] >= s.min_misfires:
            self.mis[c, r, ld] = float(_fmedian(self.mis_metric[c, r, ld]))
        # far enough above the fired spread (false alarms) and at least misfire_share of the way
        # to a complete misfire (1: partial burns and disturbances); where the spread is wide the
        # first term wins. The misfire level seen in the run is kept for reports, not for the
        # threshold: misfires scatter widely (a second one in a row keeps more work) and a threshold
        # pushed up by the clear ones would miss the others.
        thr = med + max(s.spread_k * sig, s.misfire_share * (1.0 - med))
        self.thr[c, r, ld] = float(np.clip(thr, s.threshold_min, s.threshold_max))


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
    event comes out exactly once, at most ``n_cyl`` events later. ``finish()`` flushes the rest.
    """

    def __init__(self, engine: Engine, *, settings: MisfireSettings | None = None):
        self.engine = engine
        self.s = settings or MisfireSettings()
        self.n = engine.n_cylinders
        self._cells = _Cells(self.n, self.s)
        self._vd = np.pi / 4 * engine.bore_m**2 * engine.stroke_m  # m³, swept volume per cylinder
        cyls, angles = firing_sequence(engine)
        iv = np.diff(np.concatenate((angles, [angles[0] + engine.cycle_deg])))
        # expected interval *before* each position of the firing sequence
        self._expected_before = np.roll(iv, 1)
        self._holdoff = self.s.holdoff_events if self.s.holdoff_events is not None else 2 * self.n
        self._nn = 2 * self.n  # neighbours on each side: two cycles
        # expected distance between the 2nd largest and the nn-th largest of 2nn normal values
        # (Blom's approximation of normal order statistics), to turn the range into a sigma
        m = 2 * self._nn
        blom = lambda i: ndtri((m - i + 1 - 0.375) / (m + 0.25))  # noqa: E731  i-th largest
        self._range_scale = float(blom(2) - blom(self._nn)) if self._nn > 2 else 1.0
        self._raw = np.zeros(0, dtype=RAW_EVENT_DTYPE)
        self._thr_in = np.zeros(0)
        self._done_upto: int | None = None  # global index of the next event to decide
        self._origin = 0
        self._last_misfire = -(10**18)
        self._last_cyl = 0
        self._last_closed_t = -np.inf
        self._prev: np.ndarray | None = None  # the last decided event (for intervals)
        self._prev_index = -1
        self._block_acc: list[np.ndarray] = []
        self._mis_acc: list[np.ndarray] = []
        self._block_id: int | None = None

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
            self._origin = self._done_upto
        return self._decide(final=False)

    def finish(self) -> np.ndarray:
        return self._decide(final=True)

    def _decide(self, *, final: bool) -> np.ndarray:
        if self._done_upto is None or not self._raw.size:
            return empty_events(0)
        first = int(self._raw["index"][0])
        last = int(self._raw["index"][-1])
        ready_hi = last + 1 if final else last + 1 - self._nn  # events < ready_hi are decidable
        outs = []
        while self._done_upto < ready_hi:
            end = self._block_end(self._done_upto)
            seg_hi = min(ready_hi, end)
            outs.append(self._segment(self._done_upto - first, seg_hi - first))
            self._done_upto = seg_hi
            if seg_hi == end:
                self._close_block()
        # keep n events of history before the next undecided one
        keep_from = max(self._done_upto - first - self._nn, 0)
        self._raw = self._raw[keep_from:]
        self._thr_in = self._thr_in[keep_from:]
        if final:
            self._close_block()
        return np.concatenate(outs) if outs else empty_events(0)

    def _block_end(self, i: int) -> int:
        """End (exclusive) of the statistics block holding event i: blocks of 16, 32, 64 events
        from the run's first event let the statistics start early, then ``block`` each."""
        rel = i - self._origin
        b = self.s.block
        for edge in (16, 48, 112):
            if rel < edge and edge < b:
                return self._origin + edge
        start = 112 if b > 64 else 0
        return self._origin + start + ((rel - start) // b + 1) * b

    def _close_block(self) -> None:
        if self._block_acc:
            acc = np.concatenate(self._block_acc)
            self._block_acc = []
            if acc.size:
                self._cells.update(acc["c"], acc["r"], acc["l"], acc["m"], acc["q"])
        if self._mis_acc:
            macc = np.concatenate(self._mis_acc)
            self._mis_acc = []
            if macc.size:
                self._cells.update_misfires(macc["c"], macc["r"], macc["l"], macc["m"])

    # -- one vectorised segment (inside one statistics block) -----------------------------------
    def _segment(self, i0: int, i1: int) -> np.ndarray:
        n, s, cells = self.n, self.s, self._cells
        raw = self._raw
        idx = np.arange(i0, i1)
        ev = raw[i0:i1]
        out = empty_events(idx.size)
        out["t"] = ev["t"]
        out["cycle"] = ev["cycle"]
        out["cylinder"] = ev["cylinder"]
        out["rpm"] = ev["rpm"]
        out["throttle"] = self._thr_in[i0:i1]
        cyl0 = ev["cylinder"].astype(np.int64) - 1
        work = np.where(ev["usable"], ev["work"], np.nan)
        # neighbours k-n..k+n without k (missing ones at the edges of the buffer are NaN)
        nn = self._nn
        offs = np.concatenate((np.arange(-nn, 0), np.arange(1, nn + 1)))
        j = idx[:, None] + offs[None, :]
        inb = (j >= 0) & (j < raw.size)
        jc = np.clip(j, 0, raw.size - 1)
        w_all = np.where(raw["usable"], raw["work"], np.nan)
        nb = np.where(inb, w_all[jc], np.nan)
        # upper half of the neighbours (NaN sorts last: count the finite ones)
        nb_sorted = np.sort(np.where(np.isfinite(nb), nb, -np.inf), axis=1)[:, ::-1]
        cnt = np.isfinite(nb).sum(axis=1)
        half = np.maximum(cnt // 2, 1)
        take = np.arange(2 * nn)[None, :] < half[:, None]
        base = np.where(take & np.isfinite(nb_sorted), nb_sorted, 0.0).sum(axis=1) / half
        base = np.where(cnt >= max(2, nn), base, np.nan)
        # the spread of the neighbours (each over its cylinder's factor) says how disturbed the
        # crank is right now: a rough road or a ringing driveline widens it, and then a misfire
        # must stand out by z_local of it. The spread is the range between the second largest
        # and the median-rank value, which leaves out a rebound just after a misfire (largest)
        # and neighbouring misfires (lowest).
        nbn = nb / cells.cyl_factor[raw["cylinder"].astype(np.int64)[jc] - 1]
        nbn_sorted = np.sort(np.where(np.isfinite(nbn), nbn, -np.inf), axis=1)[:, ::-1]
        full = cnt == 2 * nn
        with np.errstate(invalid="ignore", divide="ignore"):
            rng_ = nbn_sorted[:, 1] - nbn_sorted[:, nn - 1]
            local_rel = rng_ / self._range_scale / np.abs(nbn_sorted[:, 1:nn].mean(axis=1))
        local_rel = np.where(full & np.isfinite(local_rel), local_rel, 0.0)
        load_bar = base / self._vd / 1e5
        rc, lc = cells.cell(ev["rpm"], load_bar)
        sigma = np.where(
            cells.fill[cyl0, rc, lc] >= s.min_cell_events,
            cells.sigma[cyl0, rc, lc],
            cells.cyl_sigma[cyl0],
        )
        factor = np.where(
            cells.fill[cyl0, rc, lc] >= s.min_cell_events,
            cells.factor[cyl0, rc, lc],
            cells.cyl_factor[cyl0],
        )
        ref = base * factor
        with np.errstate(invalid="ignore", divide="ignore"):
            metric = np.where(ref > 0, 1.0 - work / ref, np.nan)
            contribution = work / base
        if s.threshold is not None:
            thr = np.full(idx.size, float(s.threshold))
        else:
            learnt = cells.fill[cyl0, rc, lc] >= s.min_cell_events
            thr = np.where(learnt, cells.thr[cyl0, rc, lc], cells.cyl_thr[cyl0])
        # enable condition: no decision before the run has shown its first statistics block
        warm = np.isfinite(metric) & (ev["index"] - self._origin < s.warmup_events)
        ok = np.isfinite(metric) & ~warm
        verdict = np.where(ok, FIRED, UNUSABLE).astype(np.int8)
        # fuel cut: closed (or unknown) throttle, rpm above the overrun limit, nothing fires
        tp = out["throttle"]
        closed = ~(tp > s.closed_throttle_pct)
        # the ECU cuts and restores fuel around a closed throttle (gear changes, overrun entry
        # and exit) faster than a 100 Hz status signal shows: a closed throttle within two
        # cycles counts for an event that has no work
        thr_nb = np.where(inb, self._thr_in[jc], np.nan)
        closed_near = closed | (thr_nb <= s.closed_throttle_pct).any(axis=1)
        seen_closed = np.where(tp <= s.closed_throttle_pct, ev["t"], -np.inf)
        t_closed = np.maximum.accumulate(np.concatenate(([self._last_closed_t], seen_closed)))
        self._last_closed_t = float(t_closed[-1])
        closed_near |= ev["t"] - t_closed[1:] <= s.fuel_cut_hold_s
        gi = idx[:, None] + np.arange(-n + 1, n)[None, :]
        gin = (gi >= 0) & (gi < raw.size)
        around = np.where(gin, w_all[np.clip(gi, 0, raw.size - 1)], np.nan)
        n_around = np.isfinite(around).sum(axis=1)
        around_sum = np.where(np.isfinite(around), around, 0.0).sum(axis=1)
        around_mean = around_sum / np.maximum(n_around, 1)
        around_mean = np.where(n_around > 0, around_mean, np.nan)
        # with the throttle closed above the cut speed, an event without work is the ECU's
        # overrun cut (alone at the start and end of a cut, or with its neighbours in it)
        none_fire = around_mean / self._vd / 1e5 < s.fuel_cut_work_bar
        no_fire = none_fire | (work / self._vd / 1e5 < s.fuel_cut_work_bar)
        # with the throttle seen closed (now or moments ago) above the cut speed no combustion
        # is expected: an event without it is the ECU's cut, not a misfire. With no throttle
        # signal only "no cylinder fires" tells a cut.
        known_closed = tp <= s.closed_throttle_pct
        weak = ok & (metric > thr)
        fuel_cut = (closed & none_fire) | (known_closed & no_fire)
        fuel_cut |= closed_near & (no_fire | weak) & ~np.isnan(tp)
        fuel_cut &= (ev["rpm"] >= s.fuel_cut_min_rpm) & np.isfinite(around_mean)
        # only the part of the local spread beyond twice the cell's usual spread counts
        excess = np.sqrt(np.maximum(local_rel**2 - (3.0 * sigma) ** 2, 0.0))
        cand = ok & ~fuel_cut & (metric > thr) & (metric > s.z_local * excess)
        verdict[fuel_cut] = FUEL_CUT
        verdict[cand] = MISFIRE
        # ring-down hold-off: sequential, but only over the (rare) candidates
        gidx = ev["index"]
        strict = thr + s.holdoff_margin * np.maximum(1.0 - thr, 0.0)
        cyl_now = ev["cylinder"]
        for k in np.flatnonzero(cand):
            # a burst on one cylinder is real; the ring-down shows on the other cylinders' events
            ring = gidx[k] - self._last_misfire <= self._holdoff and cyl_now[k] != self._last_cyl
            if ring and metric[k] <= strict[k]:
                verdict[k] = FIRED
            else:
                self._last_misfire = int(gidx[k])
                self._last_cyl = int(cyl_now[k])
        out["metric"] = metric
        out["threshold"] = thr
        out["verdict"] = verdict
        scale = np.maximum(3.0 * sigma, 0.05)
        conf = np.clip(np.abs(metric - thr) / scale, 0.0, 1.0)
        conf[fuel_cut] = np.clip(
            (s.fuel_cut_work_bar - around_mean[fuel_cut] / self._vd / 1e5) / s.fuel_cut_work_bar,
            0,
            1,
        )
        out["confidence"] = np.where(np.isfinite(conf), conf, 0.0)
        out["contribution"] = contribution
        self._intervals(out, ev)
        # statistics from fired, usable events of this segment (applied when the block closes)
        # a steady pattern that makes one cylinder look weak (a driveline resonance, a weak
        # cylinder) is learnt too: events below ``learn_below`` feed the cylinder factor even
        # when the current threshold calls them misfires; complete misfires never do ...
        fired = (verdict == FIRED) | (((verdict == MISFIRE) | warm) & (metric < s.learn_below))
        fired &= np.isfinite(base)
        acc = np.zeros(
            int(fired.sum()),
            dtype=[("c", "i8"), ("r", "i8"), ("l", "i8"), ("m", "f8"), ("q", "f8")],
        )
        acc["c"], acc["r"], acc["l"] = cyl0[fired], rc[fired], lc[fired]
        # ... but only into the cylinder factor: the spread (and so the threshold) is learnt from
        # events called fired, so that a burst of misfires cannot widen it and hide itself
        acc["m"] = np.where((verdict == FIRED) | warm, metric, np.nan)[fired]
        acc["q"] = (work / base)[fired]
        self._block_acc.append(acc)
        clear = (verdict == MISFIRE) & (conf >= 0.5) & np.isfinite(base)
        mdt = [("c", "i8"), ("r", "i8"), ("l", "i8"), ("m", "f8")]
        macc = np.zeros(int(clear.sum()), dtype=mdt)
        macc["c"], macc["r"], macc["l"] = cyl0[clear], rc[clear], lc[clear]
        macc["m"] = metric[clear]
        self._mis_acc.append(macc)
        return out

    def _intervals(self, out: np.ndarray, ev: np.ndarray) -> None:
        pos_in_seq = np.mod(ev["index"], self.n)
        out["expected_interval_deg"] = self._expected_before[pos_in_seq]
        at = ev["theta"] + ev["rise_deg"]
        fired = out["verdict"] == FIRED
        at = np.where(fired, at, np.nan)
        if self._prev is not None:
            prev_at = np.concatenate(([self._prev[0]], at[:-1]))
            prev_idx = np.concatenate(([self._prev_index], ev["index"][:-1]))
        else:
            prev_at = np.concatenate(([np.nan], at[:-1]))
            prev_idx = np.concatenate(([-2], ev["index"][:-1]))
        iv = at - prev_at
        out["interval_deg"] = np.where(prev_idx == ev["index"] - 1, iv, np.nan)
        if ev.size:
            self._prev = np.array([at[-1]])
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
