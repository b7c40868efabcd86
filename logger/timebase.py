"""Put a sensor's own clock onto the host (CAN) time base.

A serial board stamps each sample with its own clock; the host stamps each port read with
``time.time()`` when it arrives, the same clock python-can uses for live CAN frames (and that the
capture file and the CAN log record). The two clocks differ by an offset and a small rate error:

    host ≈ offset + (1 + drift) · device

A read's arrival is never earlier than the instant its last sample was taken, and usually later
by a few ms of USB scheduling, buffering and thread wake-up. So the lowest points of
``host - device`` carry the relation; least squares over all points would carry the mean
latency instead. :class:`ClockAligner` therefore

1. cuts the device time axis into windows of ``window_s`` and keeps, per window, the pair with
   the smallest ``host - device`` (one number per window: memory is bounded);
2. fits the lower support line of the last ``span_windows`` window minima: the line that lies
   under every minimum and is highest at their centroid (the edge of their lower convex hull
   above the centroid; the solution of "maximise the line's sum subject to lying under all
   points", a linear programme, without iterations); isolated late windows (stalls) cannot pull
   it up, and the centroid keeps it from bending to the newest point;
3. maps each sample with the line fitted for its window.

Determinism rule (live and replay give identical numbers): the samples of window ``k`` are
mapped with the line fitted over the minima of the last ``span_windows`` non-empty windows up to
and including ``k + 1``. They are released as soon as window ``k + 1`` is closed, i.e. when a
sample of window ``k + 2`` or later has been pushed: a bounded lookahead of one to two windows
(1-2 s by default). How the samples are grouped into pushes does not matter. At an epoch
boundary (link break or device clock jump, flagged by the caller) and at :meth:`flush`, the
pending samples are mapped with the line over the windows seen so far, which again depends only
on the data. Within an epoch device times must not decrease (the frame parser's unwrapping
guarantees it).

A host clock that is stepped (NTP) while recording is not modelled: the fit follows a step down
within one window and a step up within ``span_windows`` windows.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from crankbeat.errors import InputError


def _lower_hull(x: np.ndarray, y: np.ndarray) -> list[int]:
    hull: list[int] = []
    for i in range(len(x)):
        while len(hull) >= 2:
            i0, i1 = hull[-2], hull[-1]
            if (x[i1] - x[i0]) * (y[i] - y[i0]) - (y[i1] - y[i0]) * (x[i] - x[i0]) <= 0:
                hull.pop()
            else:
                break
        hull.append(i)
    return hull


def support_line(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Line ``y = a + b·x`` under every point and highest at the points' centroid.

    Parameters
    ----------
    x, y : (m,) float64
        Points sorted by ``x`` (strictly increasing); ``m >= 1``.

    Returns
    -------
    a, b : float
        Intercept and slope. With one point (or all at one ``x``) the slope is 0.
    """
    if len(x) == 0:
        raise InputError("support_line needs at least one point, got 0")
    if len(x) == 1 or x[-1] == x[0]:
        return float(np.min(y)), 0.0
    hull = _lower_hull(x, y)
    xm = float(np.mean(x))
    for i0, i1 in zip(hull[:-1], hull[1:], strict=True):  # noqa: B007 (both used below)
        if x[i1] >= xm:
            break
    b = (y[i1] - y[i0]) / (x[i1] - x[i0])
    return float(y[i0] - b * x[i0]), float(b)


class ClockAligner:
    """Streaming device-clock to host-clock mapping (lower-envelope fit, bounded lookahead).

    Parameters
    ----------
    window_s : float, optional
        Length of a device-time window, s; one minimum of ``host - device`` is kept per window.
        Default 1 s. The lookahead is between one and two windows.
    span_windows : int, optional
        Number of window minima the line is fitted over (default 60: one minute). Longer spans
        average more read jitter; shorter ones follow a drifting crystal more closely.
    max_pending : int, optional
        Safety valve for a device clock that does not advance (a broken board): beyond this many
        held samples the oldest are released with the latest fit and counted in
        :attr:`forced`. Never reached with a working clock (two windows hold far fewer).

    Notes
    -----
    Memory: ``span_windows`` minima plus the samples of the last two windows.
    See the module docstring for the rule that makes live and replay identical.
    """

    def __init__(
        self, *, window_s: float = 1.0, span_windows: int = 60, max_pending: int = 1_000_000
    ) -> None:
        if not (window_s > 0 and np.isfinite(window_s)):
            raise InputError(f"window_s must be a positive number of seconds, got {window_s!r}")
        if int(span_windows) < 2:
            raise InputError(f"span_windows must be >= 2, got {span_windows!r}")
        self.window_s = float(window_s)
        self.span_windows = int(span_windows)
        self.max_pending = int(max_pending)
        self.epochs = 0
        self.forced = 0
        self._reset_epoch()

    def _reset_epoch(self) -> None:
        self._t0: float | None = None  # device time of the epoch's first sample
        self._y0 = 0.0  # host - device of the epoch's first pair (keeps the hull numbers small)
        self._hist: deque[tuple[int, float, float]] = deque(maxlen=self.span_windows)
        self._open: tuple[int, float, float] | None = None  # window, x, y of the open window's min
        self._closed_to = -1  # every window <= this is closed
        self._pend_d = np.zeros(0)
        self._pend_w = np.zeros(0, dtype=np.int64)
        self._line: tuple[float, float] | None = None  # a, b in epoch-relative units

    # -- public ---------------------------------------------------------------------------
    @property
    def pending(self) -> int:
        """Samples pushed but not yet released."""
        return len(self._pend_d)

    @property
    def windows(self) -> int:
        """Window minima the current fit rests on (at most ``span_windows``)."""
        return len(self._hist)

    @property
    def fit(self) -> tuple[float, float] | None:
        """The latest line as ``(offset, drift)``: host = offset + (1 + drift)·device, or None."""
        if self._line is None or self._t0 is None:
            return None
        a, b = self._line
        return self._y0 + a - b * self._t0, b

    def push(self, device_t, host_t, *, pair=None, epoch_before=None) -> np.ndarray:
        """Add samples; return host-clock times of the oldest pending samples that are now final.

        Parameters
        ----------
        device_t : (n,) float64
            Device clock of each sample, s (unwrapped; non-decreasing within an epoch).
        host_t : (n,) float64
            Host arrival time of the read each sample came in, s.
        pair : (n,) bool, optional
            Which samples are clock pairs (the last sample of each read). Default: all; the
            earlier samples of a read only ever lie above the envelope, so they change nothing
            but cost time.
        epoch_before : (n,) bool, optional
            True where the device clock may have restarted or the link broke just before the
            sample: the pending samples are released with the old fit and a new fit begins.

        Returns
        -------
        (k,) float64
            Times on the host clock, s, of the next ``k`` samples in push order (``k`` may be 0,
            or more than ``n`` when earlier samples are released).
        """
        d = np.asarray(device_t, dtype=np.float64).reshape(-1)
        h = np.asarray(host_t, dtype=np.float64).reshape(-1)
        if h.shape != d.shape:
            raise InputError(f"device_t and host_t differ in length: {d.shape} vs {h.shape}")
        p = np.ones(len(d), bool) if pair is None else np.asarray(pair, bool).reshape(-1)
        e = np.zeros(len(d), bool) if epoch_before is None else np.asarray(epoch_before, bool)
        if p.shape != d.shape or e.reshape(-1).shape != d.shape:
            raise InputError(f"pair and epoch_before must have the length of device_t ({len(d)})")
        out: list[np.ndarray] = []
        cuts = [0, *np.flatnonzero(e.reshape(-1)).tolist(), len(d)]
        for k, (a, b) in enumerate(zip(cuts[:-1], cuts[1:], strict=True)):
            if k > 0 and a < len(d):
                out.append(self.flush())
                self._reset_epoch()
                self.epochs += 1
            if b > a:
                out.append(self._push_epoch(d[a:b], h[a:b], p[a:b]))
        return np.concatenate(out) if out else np.zeros(0)

    def flush(self) -> np.ndarray:
        """Release every pending sample with the fit over all windows seen (end of stream)."""
        if not len(self._pend_d):
            return np.zeros(0)
        pts = list(self._hist)
        if self._open is not None:
            pts.append(self._open)
        if not pts:  # samples without any clock pair: nothing to map them with
            raise InputError("ClockAligner.flush: pending samples but no clock pair was pushed")
        self._line = self._fit(pts[-self.span_windows :])
        t = self._map(self._pend_d)
        self._pend_d = np.zeros(0)
        self._pend_w = np.zeros(0, dtype=np.int64)
        return t

    # -- internals ------------------------------------------------------------------------
    def _push_epoch(self, d: np.ndarray, h: np.ndarray, p: np.ndarray) -> np.ndarray:
        if self._t0 is None:
            self._t0 = float(d[0])
            first = np.flatnonzero(p)
            self._y0 = float(h[first[0]] - d[first[0]]) if len(first) else float(h[0] - d[0])
        if np.any(np.diff(d) < 0) or (len(self._pend_d) and d[0] < self._pend_d[-1]):
            raise InputError("ClockAligner.push: device times decrease within an epoch")
        w = np.floor((d - self._t0) / self.window_s).astype(np.int64)
        self._pend_d = np.concatenate([self._pend_d, d])
        self._pend_w = np.concatenate([self._pend_w, w])

        # Per-window minimum of host - device over the new pairs (w is non-decreasing).
        pw, px = w[p], d[p]
        py = (h[p] - d[p]) - self._y0
        mins: list[tuple[int, float, float]] = []
        if len(pw):
            starts = np.flatnonzero(np.r_[True, pw[1:] != pw[:-1]])
            stops = np.r_[starts[1:], len(pw)]
            for s0, s1 in zip(starts, stops, strict=True):
                j = s0 + int(np.argmin(py[s0:s1]))
                mins.append((int(pw[j]), float(px[j]), float(py[j])))
        if self._open is not None and mins and mins[0][0] == self._open[0]:
            if self._open[2] <= mins[0][2]:
                mins[0] = self._open
        elif self._open is not None:
            mins.insert(0, self._open)
        self._open = None
        latest = int(w[-1])
        out: list[np.ndarray] = []
        for win, x, y in mins:
            if win >= latest:
                self._open = (win, x, y)
                continue
            self._close_through(win - 1, out)
            self._hist.append((win, x, y))
            self._closed_to = win
            self._release_through(win - 1, out)
        self._close_through(latest - 1, out)
        excess = len(self._pend_d) - self.max_pending
        if excess > 0:
            pts = list(self._hist) + ([self._open] if self._open is not None else [])
            self._line = self._fit(pts[-self.span_windows :])
            out.append(self._map(self._pend_d[:excess]))
            self._pend_d = self._pend_d[excess:]
            self._pend_w = self._pend_w[excess:]
            self.forced += excess
        return np.concatenate(out) if out else np.zeros(0)

    def _close_through(self, win: int, out: list[np.ndarray]) -> None:
        """Windows up to ``win`` hold no more pairs: release what their closing allows."""
        if win > self._closed_to:
            self._closed_to = win
            self._release_through(win - 1, out)

    def _release_through(self, win: int, out: list[np.ndarray]) -> None:
        if not self._hist or not len(self._pend_w) or self._pend_w[0] > win:
            return
        n = int(np.searchsorted(self._pend_w, win, side="right"))
        self._line = self._fit(list(self._hist))
        out.append(self._map(self._pend_d[:n]))
        self._pend_d = self._pend_d[n:]
        self._pend_w = self._pend_w[n:]

    def _fit(self, pts: list[tuple[int, float, float]]) -> tuple[float, float]:
        x = np.array([q[1] for q in pts]) - self._t0
        y = np.array([q[2] for q in pts])
        return support_line(x, y)

    def _map(self, d: np.ndarray) -> np.ndarray:
        a, b = self._line
        rel = d - self._t0
        return d + (self._y0 + a + b * rel)


def align_samples(device_t, host_t, *, pair=None, epoch_before=None, **options) -> np.ndarray:
    """Whole-array form of :class:`ClockAligner`: host-clock times of every sample, s.

    Identical to pushing the same samples in any grouping and flushing at the end.
    """
    aligner = ClockAligner(**options)
    head = aligner.push(device_t, host_t, pair=pair, epoch_before=epoch_before)
    return np.concatenate([head, aligner.flush()])


def align_clock(device_t, host_t, *, window_s: float = 1.0) -> tuple[float, float]:
    """One clock relation for a whole recording: ``host ≈ offset + (1 + drift)·device``.

    Parameters
    ----------
    device_t : (n,) float64
        Device time of the last sample of each read, s (non-decreasing).
    host_t : (n,) float64
        Host arrival time of each read, s.
    window_s : float, optional
        Window over which the lowest ``host - device`` is kept, s.

    Returns
    -------
    offset : float
        s.
    drift : float
        Rate error of the device clock (dimensionless; 30e-6 is 30 ppm fast host).
    """
    d = np.asarray(device_t, dtype=np.float64).reshape(-1)
    h = np.asarray(host_t, dtype=np.float64).reshape(-1)
    if len(d) == 0 or h.shape != d.shape:
        raise InputError(f"align_clock needs equal, non-empty arrays, got {d.shape} and {h.shape}")
    if np.any(np.diff(d) < 0):
        raise InputError("align_clock: device_t must be non-decreasing")
    if not (window_s > 0):
        raise InputError(f"window_s must be positive, got {window_s!r}")
    y0 = float(h[0] - d[0])
    t0 = float(d[0])
    y = (h - d) - y0
    w = np.floor((d - t0) / window_s).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, w[1:] != w[:-1]])
    idx = np.array([s + int(np.argmin(y[s:e]))
                    for s, e in zip(starts, np.r_[starts[1:], len(w)], strict=True)])
    a, b = support_line(d[idx] - t0, y[idx])
    return y0 + a - b * t0, b
