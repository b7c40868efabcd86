"""Rough-road detection from the accelerometer.

A rough surface shakes the bike broadband and mostly below the engine's orders: body and wheel
motion of a few hertz. The detector watches the energy in a low band (default 2-8 Hz, below the
half order even at a 1300 rpm idle, 10.8 Hz) summed over the three axes:

* each axis through a Butterworth band-pass (second-order sections with carried state);
* the squared sum averaged over frames of ``frame_s``, then over a sliding ``window_s``;
* a threshold learnt from the run: ``k`` times the running median of that r.m.s. over all
  frames so far (a log-spaced histogram: bounded memory), never below an absolute ``floor``;
  a rough stretch is the minority of a ride, so the median is the smooth road's level;
* the first ``settle_s`` of the run only settle the filter (no learning, no spans);
* hysteresis: a span opens when the r.m.s. exceeds the threshold and stays open while it is
  above ``release`` × threshold; it closes ``hold_s`` after the last such frame. Its start is
  put one window before the frame that opened it (the window's lag), its end at the last frame
  above the release level. Spans shorter than ``min_span_s`` are dropped.

A misfire is a single torque dip; it shakes the bar for a few tens of milliseconds, far shorter
than a window, so it does not open a span by itself. When ``rpm`` is given, frames whose half
order (rpm / 120 Hz) lies below 1.25 × the band's top are neither learnt from nor allowed to
open a span (the engine itself would fill the band).

Causal: a span is reported when it closes, at most ``hold_s + frame_s`` after its end.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from crankbeat.errors import InputError

_HIST_LO, _HIST_HI, _HIST_STEP = -8.0, 3.0, 0.02  # log10 of the r.m.s., decades


@dataclass
class RoughStep:
    """What one push produced: spans closed by it, and whether a span is open now."""

    closed: list[tuple[float, float]] = field(default_factory=list)
    open_since: float | None = None
    threshold: float = float("nan")  # the threshold in force at the last frame


class RoughRoadDetector:
    """Streaming rough-road detector (see the module docstring).

    Parameters
    ----------
    fs : float
        Sampling rate, Hz.
    band_hz : (float, float)
        Band whose energy is watched, Hz.
    frame_s, window_s : float
        Frame length and averaging window, s.
    k : float
        Threshold factor over the run's median r.m.s.
    floor : float
        Absolute lowest threshold, in the unit of the samples (g on the rig).
    release : float
        Fraction of the threshold below which a span may close (hysteresis), 0 < release <= 1.
    hold_s : float
        Time below the release level before a span closes, s.
    min_span_s : float
        Shortest span kept, s.
    order : int
        Butterworth order of the band-pass (per edge).
    settle_s : float
        Time after the first sample during which the band-pass settles: frames then are neither
        learnt from nor allowed to open a span, s.
    """

    def __init__(
        self, fs: float, *, band_hz: tuple[float, float] = (2.0, 8.0), frame_s: float = 0.05,
        window_s: float = 0.5, k: float = 3.0, floor: float = 0.02, release: float = 0.6,
        hold_s: float = 0.5, min_span_s: float = 0.5, order: int = 2, settle_s: float = 2.0,
    ) -> None:
        lo, hi = band_hz
        if not (np.isfinite(fs) and fs > 0):
            raise InputError(f"fs must be a positive number of Hz, got {fs!r}")
        if not (0 < lo < hi < fs / 2):
            raise InputError(f"band_hz must satisfy 0 < lo < hi < fs/2 = {fs / 2}, got {band_hz!r}")
        if not (0 < release <= 1 and k > 0 and floor >= 0 and hold_s >= 0 and min_span_s >= 0):
            raise InputError(
                f"need 0 < release <= 1, k > 0, floor >= 0, hold_s >= 0, min_span_s >= 0; got "
                f"release={release!r}, k={k!r}, floor={floor!r}, hold_s={hold_s!r}, "
                f"min_span_s={min_span_s!r}"
            )
        self.fs = float(fs)
        self.band_hz = (float(lo), float(hi))
        self.frame_n = max(1, int(round(frame_s * fs)))
        self.frame_s = self.frame_n / self.fs
        self.window_frames = max(1, int(round(window_s / self.frame_s)))
        self.k, self.floor, self.release = float(k), float(floor), float(release)
        self.hold_s, self.min_span_s = float(hold_s), float(min_span_s)
        self.settle_s = float(settle_s)
        self._t_first = np.nan
        self.rpm_min = 120.0 * 1.25 * hi  # half order at 1.25 × the band's top
        self._sos = signal.butter(order, self.band_hz, "bandpass", fs=fs, output="sos")
        self._zi: np.ndarray | None = None
        # partial frame
        self._acc_e = 0.0
        self._acc_n = 0
        self._acc_rpm = 0.0
        self._acc_t0 = np.nan
        # last window_frames frame energies (and whether each is usable)
        self._tail = np.empty(0)  # energies of the last window_frames - 1 frames
        self._seen = 0  # frames seen so far
        self._hist = np.zeros(int(round((_HIST_HI - _HIST_LO) / _HIST_STEP)) + 1, np.int64)
        self._open: float | None = None
        self._last_above = np.nan
        self.threshold = float("nan")

    # -- frames -------------------------------------------------------------------------
    def _frames(self, t: np.ndarray, xyz: np.ndarray, rpm: np.ndarray | None):
        """Energies, start/end times and mean rpm of the frames completed by these samples."""
        if self._zi is None and len(t):  # start settled on the first value: no step from rest
            self._zi = signal.sosfilt_zi(self._sos)[:, :, None] * xyz[0][None, None, :]
        if len(t):
            y, self._zi = signal.sosfilt(self._sos, xyz, axis=0, zi=self._zi)
        else:
            y = np.empty((0, 3))
        e = np.sum(y * y, axis=1)
        r = np.full(len(t), np.inf) if rpm is None else rpm
        n = self.frame_n
        # prepend the partial frame as one weighted pseudo-sample
        start = n - self._acc_n  # samples needed to complete the partial frame
        first_e = self._acc_e + np.sum(e[:start])
        first_r = self._acc_rpm + np.sum(r[:start])
        first_t0 = self._acc_t0 if self._acc_n else (t[0] if len(t) else np.nan)
        out_e, out_r, out_t0, out_t1 = [], [], [], []
        if len(t) >= start:
            out_e.append([first_e / n])
            out_r.append([first_r / n])
            out_t0.append([first_t0])
            out_t1.append([t[start - 1] + 1 / self.fs])
            rest = len(t) - start
            m = rest // n
            if m:
                block = slice(start, start + m * n)
                out_e.append(e[block].reshape(m, n).mean(axis=1))
                out_r.append(r[block].reshape(m, n).mean(axis=1))
                out_t0.append(t[block][::n])
                out_t1.append(t[block][n - 1::n] + 1 / self.fs)
            tail = slice(start + m * n, len(t))
            self._acc_e = float(np.sum(e[tail]))
            self._acc_rpm = float(np.sum(r[tail]))
            self._acc_n = len(t) - (start + m * n)
            self._acc_t0 = t[tail][0] if self._acc_n else np.nan
        else:
            self._acc_e, self._acc_rpm = first_e, first_r
            self._acc_n += len(t)
            self._acc_t0 = first_t0
        if not out_e:
            return (np.empty(0),) * 4
        return tuple(np.concatenate(v) for v in (out_e, out_r, out_t0, out_t1))

    @property
    def open_since(self) -> float | None:
        """Start of the span open now (None when none is open), s."""
        return self._open

    # -- public -------------------------------------------------------------------------
    def push(self, t: ArrayLike, xyz: ArrayLike, rpm: ArrayLike | None = None) -> RoughStep:
        """Add samples; return the spans this closed.

        Parameters
        ----------
        t : (n,) array_like
            Sample times, s.
        xyz : (n, 3) array_like
            Acceleration, any unit (``floor`` is in the same unit).
        rpm : (n,) array_like, optional
            Engine speed at each sample, rpm (NaN where unknown).
        """
        tt = np.asarray(t, dtype=float).reshape(-1)
        a = np.asarray(xyz, dtype=float)
        if a.shape != (len(tt), 3):
            raise InputError(f"xyz must have shape ({len(tt)}, 3) to match t, got {a.shape}")
        r = None
        if rpm is not None:
            r = np.asarray(rpm, dtype=float).reshape(-1)
            if r.shape != tt.shape:
                raise InputError(f"rpm must have {len(tt)} values to match t, got {r.shape}")
            r = np.where(np.isnan(r), np.inf, r)
        step = RoughStep()
        fe, fr, f0, f1 = self._frames(tt, a, r)
        if len(fe):
            level, usable = self._levels(fe, fr, f0, f1)
            thr = self._thresholds(level, usable)
            self._hysteresis(level.tolist(), usable.tolist(), thr.tolist(), f1.tolist(), step)
            self.threshold = float(thr[-1])
        step.open_since = self._open
        step.threshold = self.threshold
        return step

    def _levels(self, fe: np.ndarray, fr: np.ndarray, f0: np.ndarray, f1: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
        """Window r.m.s. at each frame, and whether the frame may be learnt from / trigger."""
        w = self.window_frames
        if np.isnan(self._t_first):
            self._t_first = float(f0[0])
        seen = self._seen
        allv = np.concatenate((self._tail, fe))
        p = np.arange(len(self._tail), len(allv))  # positions of the new frames in allv
        level = np.empty(len(fe))
        full = seen + np.arange(1, len(fe) + 1) >= w
        start = p - w + 1  # first frame of each window, in allv
        if full.any():
            views = np.lib.stride_tricks.sliding_window_view(allv, w)
            level[full] = views[start[full]].mean(axis=1)
        for i in np.flatnonzero(~full):  # the run's first frames: shorter windows
            level[i] = np.mean(allv[: p[i] + 1])
        level = np.sqrt(level)
        self._seen = seen + len(fe)
        self._tail = allv[-(w - 1):] if w > 1 else allv[:0]
        usable = (fr >= self.rpm_min) & (f1 - self._t_first >= self.settle_s) & full
        return level, usable

    def _thresholds(self, level: np.ndarray, usable: np.ndarray) -> np.ndarray:
        """Threshold in force at each frame (the frame itself learnt first), from the running
        histogram of log10 levels."""
        nb = len(self._hist)
        b = np.clip(np.rint((np.log10(np.maximum(level, 1e-300)) - _HIST_LO) / _HIST_STEP),
                    0, nb - 1).astype(np.int64)
        med = np.empty(len(level))
        for s in range(0, len(level), 512):
            sl = slice(s, s + 512)
            onehot = np.zeros((len(b[sl]), nb), np.int64)
            onehot[np.arange(len(b[sl])), b[sl]] = usable[sl]
            counts = self._hist[None, :] + np.cumsum(onehot, axis=0)
            total = counts.sum(axis=1)
            k = np.argmax(np.cumsum(counts, axis=1) >= ((total + 1) / 2)[:, None], axis=1)
            med[sl] = np.where(total > 0, 10.0 ** (_HIST_LO + k * _HIST_STEP), 0.0)
            self._hist = counts[-1].copy()
        return np.maximum(self.floor, self.k * med)

    def _hysteresis(self, level: list, usable: list, thr: list, t1: list, step: RoughStep
                    ) -> None:
        for lv, ok, th, t in zip(level, usable, thr, t1):
            if self._open is None:
                if ok and lv > th:
                    self._open = t - self.window_frames * self.frame_s
                    self._last_above = t
            elif ok and lv > self.release * th:
                self._last_above = t
            elif t - self._last_above >= self.hold_s:
                self._close(step)

    def _close(self, step: RoughStep) -> None:
        span = (float(self._open), float(self._last_above))  # type: ignore[arg-type]
        self._open = None
        if span[1] - span[0] >= self.min_span_s:
            step.closed.append(span)

    def finish(self) -> RoughStep:
        """Close a span still open (at its last frame above the release level)."""
        step = RoughStep()
        if self._open is not None:
            self._close(step)
        step.threshold = self.threshold
        return step


def rough_road_spans(
    t: ArrayLike, xyz: ArrayLike, fs: float, *, rpm: ArrayLike | None = None, **options: float
) -> list[tuple[float, float]]:
    """Rough-road spans of a whole record: one push of :class:`RoughRoadDetector`.

    ``options`` are the detector's keyword parameters. Returns ``[(t_start, t_end), ...]``, s.
    """
    det = RoughRoadDetector(fs, **options)  # type: ignore[arg-type]
    return det.push(t, xyz, rpm).closed + det.finish().closed


def span_mask(t: ArrayLike, spans: list[tuple[float, float]]) -> np.ndarray:
    """True where ``t`` lies inside any of ``spans`` (closed intervals)."""
    tt = np.asarray(t, dtype=float)
    mask = np.zeros(tt.shape, bool)
    for a, b in spans:
        mask |= (tt >= a) & (tt <= b)
    return mask
