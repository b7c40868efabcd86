"""First stage of the crank tracker: tooth frames -> tooth edges on the CAN time base.

Periods are the precise information: within a stretch of unbroken periods the edge times are a
cumulative sum. Frame receive times only anchor that sum: ``d = frame_time - sum`` equals the
unknown origin plus the frame's latency, which is never negative, so the lower envelope of ``d``
over a window of frames is the origin plus the smallest latency seen. The window looks
``lookahead`` frames ahead (the stage holds that many frames back) so that the first frames after
a break are anchored as well as any other.

The envelope moves in steps: whenever the frame with the smallest latency leaves the window, or the
ECU's clock drifts against the logger's (tens of ppm is common practice for crystal clocks), it
jumps by a few to tens of microseconds. Applied as is, each jump lands on the one edge between two
frames, and a tooth period 20 us short at 8000 rpm reads as a 10 % speed spike: the energy step of
a whole firing event moves by more than a misfire's. So the anchor is smoothed along the frames
(a tracking filter over about ``smooth_frames`` frames that follows a steady drift without lag,
restarted with each time segment): a jump becomes a ramp of steps ``smooth_frames`` times
smaller, and the edge intervals stay the periods the ECU measured.

A stretch ("time segment") restarts after lost frames and at every saturated (NaN) period. Lost
frames whose count can be trusted become placeholder edges, so the tooth count carries on; an
untrusted loss resets the count instead.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import minimum_filter1d
from scipy.signal import lfilter

NORMAL, SATURATED, PLACEHOLDER = 0, 1, 2


@dataclass
class EdgeBatch:
    """Edges handed from the edge stage to the sync stage (one row per edge, placeholders too)."""

    p: np.ndarray  # (n,) s, period ending at the edge (NaN: saturated or lost)
    t: np.ndarray  # (n,) s, edge time (NaN for placeholders)
    kind: np.ndarray  # (n,) int8: NORMAL, SATURATED, PLACEHOLDER
    reset: np.ndarray  # (n,) bool: the tooth count is broken just before this edge
    cam: np.ndarray  # (n,) int8: cam sample of the frame at its last edge, -2 elsewhere
    frame: np.ndarray  # (n,) int64: arrival index of the frame that carried the edge

    @classmethod
    def empty(cls) -> "EdgeBatch":
        f = np.empty(0)
        return cls(f, f.copy(), np.empty(0, np.int8), np.empty(0, bool),
                   np.empty(0, np.int8), np.empty(0, np.int64))

    def __len__(self) -> int:
        return len(self.p)

    def take(self, sl: slice) -> "EdgeBatch":
        return EdgeBatch(self.p[sl], self.t[sl], self.kind[sl], self.reset[sl], self.cam[sl],
                         self.frame[sl])

    @staticmethod
    def concat(a: "EdgeBatch", b: "EdgeBatch") -> "EdgeBatch":
        return EdgeBatch(*(np.concatenate((getattr(a, n), getattr(b, n)))
                           for n in ("p", "t", "kind", "reset", "cam", "frame")))


class EdgeStage:
    """Frames in, edges out (held back ``lookahead`` frames for the anchor's look-ahead)."""

    def __init__(self, *, lookahead: int, lookback: int, max_lost: int,
                 latency_floor_s: float, loss_tolerance: float, latency_span_s: float,
                 smooth_frames: float = 100.0) -> None:
        self.A, self.B = int(lookahead), int(lookback)
        if (self.A + self.B) % 2:
            raise ValueError("the anchor window must have an odd length")
        self.max_lost = int(max_lost)
        self.floor = float(latency_floor_s)
        self.tol = float(loss_tolerance)
        self.span = float(latency_span_s)
        self.k: int | None = None
        self.n_frames = 0  # frames seen
        self.prev_ft = np.nan
        self.prev_pmean = np.nan
        self.c_last = 0.0  # running cumulative sum of finite periods
        self.base = 0.0  # cumulative sum at the origin of the current time segment
        self.seg = 0  # id of the current time segment
        # frames not yet final, and the last B final frames (anchor history)
        self.f_seg = np.empty(0, np.int64)
        self.f_d = np.empty(0)
        self.f_hist = 0  # how many leading frames in f_* are history
        self.f_first = 0  # arrival index of f_*[0]
        self.pending: tuple | None = None  # edge arrays of the frames not yet final
        if not smooth_frames >= 1:
            raise ValueError(f"smooth_frames must be >= 1, got {smooth_frames!r}")
        alpha = 1.0 / float(smooth_frames)  # gains of the anchor's tracking filter
        beta = alpha * alpha / (2.0 - alpha)
        self._b = np.array([alpha, beta - alpha, 0.0])
        self._a = np.array([1.0, alpha + beta - 2.0, 1.0 - alpha])
        self.sm_seg = -1  # time segment of the last released frame
        self.sm_anchor = np.nan  # its smoothed anchor
        self.sm_ref = 0.0  # the segment's first anchor, s: the filter runs on differences to it
        self.sm_state = np.zeros(2)  # the tracking filter's state after the last released frame

    def push(self, ft: np.ndarray, periods: np.ndarray, cam: np.ndarray,
             lost: np.ndarray) -> EdgeBatch:
        m, k = periods.shape
        if m == 0:
            return EdgeBatch.empty()
        if self.k is None:
            self.k = k
        self._arrive(ft, periods, cam, lost)
        n_final = self.n_frames - self.A - (self.f_first + self.f_hist)
        return self._release(max(n_final, 0))

    def finish(self) -> EdgeBatch:
        return self._release(self.n_frames - (self.f_first + self.f_hist))

    # -- arrival: everything that only needs the past -------------------------------------------
    def _arrive(self, ft, periods, cam, lost) -> None:
        m, k = periods.shape
        fin = np.isfinite(periods)
        if not lost.any() and fin.all():
            self._arrive_plain(ft, periods, cam)
            return
        cnt = fin.sum(axis=1)
        pmean = np.where(cnt > 0, np.where(fin, periods, 0.0).sum(axis=1) / np.maximum(cnt, 1),
                         np.nan)
        prev_ft = np.concatenate(([self.prev_ft], ft[:-1]))
        prev_pm = np.concatenate(([self.prev_pmean], pmean[:-1]))
        p_ref = np.where(np.isfinite(prev_pm), np.where(np.isfinite(pmean),
                                                        0.5 * (prev_pm + pmean), prev_pm), pmean)
        missing = ft - prev_ft - np.nansum(periods, axis=1)
        expected = k * lost * p_ref
        trusted = (lost == 0) | ((lost <= self.max_lost) & np.isfinite(p_ref)
                                 & (np.abs(missing - expected) <= self.tol * expected + self.span))
        self.prev_ft, self.prev_pmean = float(ft[-1]), float(pmean[-1])

        n_ph = np.where(trusted, lost * k, 0)
        per_frame = n_ph + k
        n = int(per_frame.sum())
        frame_of = np.repeat(np.arange(m), per_frame)
        starts = np.concatenate(([0], np.cumsum(per_frame)[:-1]))
        pos = np.arange(n) - starts[frame_of]  # position within the frame's edge run
        is_ph = pos < n_ph[frame_of]
        real_pos = pos - n_ph[frame_of]
        p = np.full(n, np.nan)
        p[~is_ph] = periods.reshape(-1)
        kind = np.where(is_ph, PLACEHOLDER, NORMAL).astype(np.int8)
        kind[~is_ph & ~np.isfinite(p)] = SATURATED
        first_real = ~is_ph & (real_pos == 0)
        reset = first_real & ~trusted[frame_of] & (lost[frame_of] > 0)
        # time segments restart after a loss (at the first real edge) and at each saturated edge
        seg_start = (first_real & (lost[frame_of] > 0)) | (kind == SATURATED)
        p0 = np.where(kind == NORMAL, p, 0.0)
        c = np.add.accumulate(np.concatenate(([self.c_last], p0)))
        c_excl, c = c[:-1], c[1:]
        start_base = np.where(seg_start, c_excl, np.nan)
        start_base[0] = start_base[0] if seg_start[0] else self.base
        idx = np.where(np.isfinite(start_base), np.arange(n), 0)
        base = start_base[np.maximum.accumulate(idx)]
        seg = self.seg + np.cumsum(seg_start)
        S = c - base
        self.c_last, self.base, self.seg = float(c[-1]), float(base[-1]), int(seg[-1])
        last_edge = starts + per_frame - 1
        d = ft - S[last_edge]
        fseg = seg[last_edge]
        # the part of a frame behind its last edge, for edges with no anchor in their segment
        fallback = ft[frame_of] - (c[last_edge][frame_of] - c)
        cam_e = np.full(n, -2, np.int8)
        cam_e[last_edge] = cam
        frame_idx = self.n_frames + frame_of
        new = (p, kind, reset, cam_e, frame_idx, seg, S, fallback)
        self.pending = new if self.pending is None else tuple(
            np.concatenate((a, b)) for a, b in zip(self.pending, new))
        self.f_seg = np.concatenate((self.f_seg, fseg))
        self.f_d = np.concatenate((self.f_d, d))
        self.n_frames += m

    def _arrive_plain(self, ft, periods, cam) -> None:
        """The common case (no loss, no saturated period): the same numbers, fewer steps."""
        m, k = periods.shape
        n = m * k
        last = periods[-1:]
        self.prev_ft = float(ft[-1])
        self.prev_pmean = float((np.where(np.isfinite(last), last, 0.0).sum(axis=1) / k)[0])
        p = periods.reshape(-1)
        c = np.add.accumulate(np.concatenate(([self.c_last], p)))[1:]
        S = c - self.base
        self.c_last = float(c[-1])
        last_edge = np.arange(k - 1, n, k)
        d = ft - S[last_edge]
        frame_of = np.repeat(np.arange(m), k)
        fallback = ft[frame_of] - (c[last_edge][frame_of] - c)
        cam_e = np.full(n, -2, np.int8)
        cam_e[last_edge] = cam
        new = (p.copy(), np.zeros(n, np.int8), np.zeros(n, bool), cam_e, self.n_frames + frame_of,
               np.full(n, self.seg, np.int64), S, fallback)
        self.pending = new if self.pending is None else tuple(
            np.concatenate((a, b)) for a, b in zip(self.pending, new))
        self.f_seg = np.concatenate((self.f_seg, np.full(m, self.seg, np.int64)))
        self.f_d = np.concatenate((self.f_d, d))
        self.n_frames += m

    # -- release: anchor and hand over frames whose look-ahead is complete -----------------------
    def _release(self, n_rel: int) -> EdgeBatch:
        if n_rel <= 0 or self.pending is None:
            return EdgeBatch.empty()
        first_pending = self.f_first + self.f_hist
        cut = int(np.searchsorted(self.pending[4], first_pending + n_rel))
        rel = tuple(a[:cut] for a in self.pending)
        self.pending = tuple(a[cut:] for a in self.pending)
        p, kind, reset, cam, fidx, seg, S, fb = rel
        # anchor of each frame: lower envelope of d over [frame - B, frame + A], same segment only
        fs, fd = self.f_seg, self.f_d
        W = self.A + self.B + 1
        anchor = np.full(len(fd), np.inf)
        bounds = np.flatnonzero(np.diff(fs)) + 1
        for a, b in zip(np.concatenate(([0], bounds)), np.concatenate((bounds, [len(fs)]))):
            anchor[a:b] = minimum_filter1d(fd[a:b], W, mode="constant", cval=np.inf,
                                           origin=W // 2 - self.A)
        self._smooth(anchor, fs, n_rel)
        row = fidx - self.f_first
        if len(bounds) == 0 and seg[0] == fs[0] and seg[-1] == fs[0]:
            t = anchor[row] + S - self.floor  # one time segment throughout: every edge anchored
        else:
            same = fs[row] == seg
            prev = np.maximum(row - 1, 0)
            # edges of a frame that still belong to the segment before (a NaN later in it)
            use_prev = ~same & (row > 0) & (fs[prev] == seg)
            a_e = np.where(same, anchor[row], np.where(use_prev, anchor[prev], np.inf))
            t = np.where(np.isfinite(a_e), a_e + S, fb) - self.floor
        t[kind == PLACEHOLDER] = np.nan
        # keep the last B final frames as history for later anchors
        keep_from = max(self.f_hist + n_rel - self.B, 0)
        self.f_seg = self.f_seg[keep_from:]
        self.f_d = self.f_d[keep_from:]
        self.f_first += keep_from
        self.f_hist = self.f_hist + n_rel - keep_from
        return EdgeBatch(p, t, kind, reset, cam, fidx)

    def _smooth(self, anchor: np.ndarray, fs: np.ndarray, n_rel: int) -> None:
        """Low-pass the anchors of the frames being released, in place (see the module notes).

        An alpha-beta tracker (critically damped pair of gains ``alpha``, ``alpha²/(2 − alpha)``,
        a standard tracking filter): it follows a steady clock drift with no lag, and spreads a
        jump of the envelope over about ``1/alpha`` frames. Each run of one time segment restarts
        it at its first anchor, or carries on from the state after the last released frame; the
        history frame just before the released ones gets its smoothed value back too (edges of
        a frame may still belong to the segment before it).
        """
        lo, hi = self.f_hist, self.f_hist + n_rel
        if lo > 0 and fs[lo - 1] == self.sm_seg:
            anchor[lo - 1] = self.sm_anchor
        seg = fs[lo:hi]
        cuts = np.flatnonzero(np.diff(seg)) + 1
        for a, b in zip(np.concatenate(([0], cuts)), np.concatenate((cuts, [hi - lo]))):
            x = anchor[lo + a: lo + b]
            if seg[a] != self.sm_seg:  # a new time segment: at rest on its first anchor
                # filtered relative to it: absolute times (~1e9 s) would lose the microseconds
                self.sm_ref, self.sm_state = float(x[0]), np.zeros(2)
            y, self.sm_state = lfilter(self._b, self._a, x - self.sm_ref, zi=self.sm_state)
            y += self.sm_ref
            anchor[lo + a: lo + b] = y
            self.sm_seg, self.sm_anchor = int(seg[a]), float(y[-1])
