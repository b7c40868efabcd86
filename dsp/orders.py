"""Order tracking: accelerometer samples onto crank angle, order spectra, rpm-vs-order maps.

Resampling chain (computed order tracking)
------------------------------------------
1. Crank angle against time comes from the tooth edges. The grid times are found from the
   inverse, time as a function of angle: a monotone piecewise-cubic (PCHIP, Fritsch-Butland
   derivatives as in :class:`scipy.interpolate.PchipInterpolator`) through ``(angle_edges,
   t_edges)``. Monotone, so the grid times never run backwards between teeth.
2. The accelerometer is read at those times by band-limited interpolation: upsampled by 8 with a
   Kaiser-windowed sinc (12 input samples, β = 5, flat within 0.15 % up to 0.35 fs), then read
   linearly between the upsampled points (the linear read-out loses sinc²(f / 8 fs): 0.12 % at
   0.15 fs, 0.46 % at 0.3 fs).
3. Anti-alias. The angle grid's rate in time is ``samples_per_rev · rpm / 60`` and falls with the
   speed. So the signal is first put on a finer grid, ``q`` times denser, with ``q`` chosen so
   that the fine grid runs at least as fast as the sensor (``fs``) down to ``rpm_floor``: up to
   there nothing aliases (the sensor's own band ends at fs/2). The fine grid is then low-passed
   *in orders* by a linear-phase FIR (Kaiser, 80 dB; pass band to 0.4 · samples_per_rev, stop band
   from 0.6 · samples_per_rev) and decimated by ``q``. The filter's cut-off is fixed in orders,
   so it follows the engine speed. Orders up to 0.4 · samples_per_rev are clean; below
   ``rpm_floor`` the fine grid itself may alias. With ``q = 1`` (the grid alone is fast enough,
   e.g. 128 points per revolution at fs = 2 kHz and a 1000 rpm floor, as the
   :class:`dsp.vibration.VibrationAnalyzer` uses) there is no FIR.

Angles are in crank degrees, cumulative (not wrapped), 0 at cylinder 1's TDC; grid points sit at
whole multiples of ``360 / samples_per_rev`` so blocks line up with the crank in every run.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from crankbeat.errors import InputError

Window = Literal["hann", "flattop", "boxcar"]
Detrend = Literal["none", "constant", "linear"]

_HALF = 6  # interpolation kernel half-width, input samples
_UP = 8  # upsampling factor ahead of the linear read-out
_BETA = 5.0


def _upsampling_fir() -> np.ndarray:
    """Kaiser-windowed sinc for upsampling by _UP, 2·_HALF·_UP + 1 taps, gain _UP."""
    m = np.arange(-_HALF * _UP, _HALF * _UP + 1) / _UP
    return np.sinc(m) * np.kaiser(len(m), _BETA) * 1.0


_UPFIR = _upsampling_fir()


def _pchip_slopes(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Derivatives dy/dx at the knots, as scipy's PchipInterpolator sets them."""
    h = np.diff(x)
    m = np.diff(y) / h
    d = np.zeros_like(y)
    if len(x) == 2:
        d[:] = m[0]
        return d
    w1 = 2 * h[1:] + h[:-1]
    w2 = h[1:] + 2 * h[:-1]
    same = (m[:-1] * m[1:]) > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        inner = (w1 + w2) / (w1 / m[:-1] + w2 / m[1:])
    d[1:-1] = np.where(same, inner, 0.0)
    d[0] = _edge_slope(h[0], h[1], m[0], m[1])
    d[-1] = _edge_slope(h[-1], h[-2], m[-1], m[-2])
    return d


def _edge_slope(h0: float, h1: float, m0: float, larch: float) -> float:
    d = ((2 * h0 + h1) * m0 - h0 * larch) / (h0 + h1)
    if np.sign(d) != np.sign(m0):
        return 0.0
    if np.sign(m0) != np.sign(larch) and abs(d) > abs(3 * m0):
        return 3 * m0
    return d


def _hermite_on_grid(
    x: np.ndarray, y: np.ndarray, d: np.ndarray, step: float
) -> tuple[np.ndarray, np.ndarray]:
    """Cubic Hermite through (x, y) with slopes d, at the multiples of ``step`` in [x0, x-1).

    Returns the grid indices j (the points are ``j · step``) and the values there.
    """
    jk = np.ceil(x / step - 1e-9).astype(np.int64)  # first grid index at or after each knot
    counts = np.diff(jk)
    k = np.repeat(np.arange(len(x) - 1), counts)
    j = np.arange(jk[0], jk[-1], dtype=np.int64)
    h = np.diff(x)
    slope = np.diff(y) / h
    c2 = (3 * slope - 2 * d[:-1] - d[1:]) / h
    c3 = (d[:-1] + d[1:] - 2 * slope) / h**2
    s = j * step - x[k]
    return j, y[k] + s * (d[k] + s * (c2[k] + s * c3[k]))


def oversampling(fs: float, samples_per_rev: int, rpm_floor: float) -> int:
    """Fine-grid factor q: the smallest with q · samples_per_rev · rpm_floor / 60 >= fs."""
    return max(1, int(np.ceil(fs * 60.0 / (rpm_floor * samples_per_rev) - 1e-9)))


def _order_fir(q: int) -> np.ndarray:
    if q == 1:
        return np.ones(1)
    numtaps, beta = signal.kaiserord(80.0, 0.4 / q)
    numtaps += 1 - numtaps % 2  # odd: a whole-sample delay
    return signal.firwin(numtaps, 1.0 / q, window=("kaiser", beta))


@dataclass
class AngleSamples:
    """Samples on the uniform crank-angle grid.

    Attributes
    ----------
    index : (k,) int64
        Grid index: the point's angle is ``index · 360 / samples_per_rev`` degrees.
    t : (k,) float64
        Time of each point, s.
    x : (k, c) float64
        The signal at those points.
    """

    index: np.ndarray
    t: np.ndarray
    x: np.ndarray

    def __len__(self) -> int:
        return len(self.index)


class AngleResampler:
    """Streaming resampler from time samples onto the crank-angle grid (see module docstring).

    Parameters
    ----------
    fs : float
        Nominal accelerometer sampling rate, Hz (picks the fine grid; actual sample times are
        taken from ``t_samples``).
    samples_per_rev : int
        Output grid points per crank revolution (even, >= 8).
    rpm_floor : float
        Lowest speed at which the chain is alias-free, rpm.
    n_channels : int
        Columns of ``x``.
    max_buffer_s : float
        Samples older than this before the latest are dropped while no edges arrive.
    max_step_deg : float
        Larger angle steps between edges end the stretch (a re-phased crank jumps by 360°).

    Notes
    -----
    ``push`` returns the points that are final; ``finish`` returns the rest. Pushing data in
    any chunking gives the same points as one push of everything (:func:`resample_to_angle`).
    A stretch of edges ends where ``valid`` is False, the angle does not increase or jumps by
    more than ``max_step_deg``; points of
    the grid that would need data across such a break, or before the first / after the last
    sample, are not produced.
    """

    def __init__(
        self, *, fs: float, samples_per_rev: int = 64, rpm_floor: float = 1000.0,
        n_channels: int = 1, max_buffer_s: float = 2.0, max_step_deg: float = 120.0,
    ) -> None:
        if not (np.isfinite(fs) and fs > 0):
            raise InputError(f"fs must be a positive number of Hz, got {fs!r}")
        if samples_per_rev < 8 or samples_per_rev % 2:
            raise InputError(f"samples_per_rev must be even and >= 8, got {samples_per_rev!r}")
        if not rpm_floor > 0:
            raise InputError(f"rpm_floor must be > 0, got {rpm_floor!r}")
        self.fs = float(fs)
        self.samples_per_rev = int(samples_per_rev)
        self.q = oversampling(fs, samples_per_rev, rpm_floor)
        self.fir = _order_fir(self.q)
        self._half_fir = (len(self.fir) - 1) // 2
        self.fine_step_deg = 360.0 / (self.q * self.samples_per_rev)
        self.n_channels = int(n_channels)
        self.max_buffer_s = float(max_buffer_s)
        self.max_step_deg = float(max_step_deg)
        # samples
        self._ts = np.empty(0)
        self._xs = np.empty((0, self.n_channels))
        # edges of the current stretch not yet consumed: knots of t(θ)
        self._th = np.empty(0)
        self._te = np.empty(0)
        self._at_start = True
        self._out: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        # fine points with known time waiting for samples
        self._pend_j = np.empty(0, dtype=np.int64)
        self._pend_t = np.empty(0)
        # fine values waiting for the FIR (contiguous run of fine indices)
        self._fine_j = np.empty(0, dtype=np.int64)
        self._fine_t = np.empty(0)
        self._fine_x = np.empty((0, self.n_channels))

    # -- edges -> fine grid times ---------------------------------------------------------
    def _emit_times(self, final: bool) -> None:
        """Turn the buffered knots into fine-grid times, as far as their slopes are final.

        The buffer holds the knots of the current stretch not yet used up, plus (when the
        stretch has already started) the one knot before, so interior slopes see both
        neighbours. The slope at the stretch's last knot uses the end rule: only on ``final``.
        """
        th, te = self._th, self._te
        n = len(th)
        first = 0 if self._at_start else 1  # left knot of the next interval
        last = n - 1 if final else n - 2  # right knot of the last interval to emit
        if n < 2 or last <= first:
            return
        d = _pchip_slopes(th, te)
        sl = slice(first, last + 1)
        j, t = _hermite_on_grid(th[sl], te[sl], d[sl], self.fine_step_deg)
        self._pend_j = np.concatenate((self._pend_j, j))
        self._pend_t = np.concatenate((self._pend_t, t))
        self._th, self._te = th[last - 1:], te[last - 1:]
        self._at_start = False

    def _end_stretch(self) -> None:
        self._emit_times(final=True)
        self._th, self._te = np.empty(0), np.empty(0)
        self._at_start = True

    # -- fine grid times -> fine values --------------------------------------------------
    def _interpolate(self, final: bool) -> None:
        if len(self._pend_t) == 0 or len(self._ts) == 0:
            return
        ts, n = self._ts, len(self._ts)
        # sample interval holding each time, and the fraction into it (kept apart from the
        # integer so that the result does not depend on where the buffer starts)
        base = np.searchsorted(ts, self._pend_t, side="right") - 1
        ready = (base + 1 + _HALF <= n - 1) | final
        k = int(np.argmin(ready)) if not ready.all() else len(ready)
        base = base[:k]
        ok = (base >= _HALF) & (base + 1 + _HALF <= n - 1)
        j = self._pend_j[:k][ok]
        t = self._pend_t[:k][ok]
        if len(j):
            b = base[ok]
            frac = (t - ts[b]) / (ts[b + 1] - ts[b])
            self._add_fine(j, t, self._read(b, frac))
        self._pend_j, self._pend_t = self._pend_j[k:], self._pend_t[k:]

    def _read(self, base: np.ndarray, frac: np.ndarray) -> np.ndarray:
        """x at sample positions base + frac: upsampled by _UP around them, read linearly."""
        r0, r1 = int(base[0]) - _HALF, int(base[-1]) + 1 + _HALF
        y = signal.upfirdn(_UPFIR, np.ascontiguousarray(self._xs[r0: r1 + 1].T), up=_UP, axis=1)
        pos = frac * _UP  # exact: _UP is a power of two
        k = np.minimum(np.floor(pos).astype(np.int64), _UP - 1)
        w = pos - k
        # upfirdn's output p sits at upsampled position r0·_UP + p - _HALF·_UP
        p = (base - r0 + _HALF) * _UP + k
        out = np.empty((len(p), self.n_channels))
        for c in range(self.n_channels):  # one gather per channel: contiguous rows are fastest
            out[:, c] = np.take(y[c], p) * (1.0 - w) + np.take(y[c], p + 1) * w
        return out

    def _add_fine(self, j: np.ndarray, t: np.ndarray, vals: np.ndarray) -> None:
        fj = np.concatenate((self._fine_j, j))
        ft = np.concatenate((self._fine_t, t))
        fx = np.concatenate((self._fine_x, vals))
        # a hole ends what the FIR can use: finish each run before a hole (one push can bring
        # several holes, e.g. after lost CAN frames; every run must be contiguous)
        holes = np.flatnonzero(np.diff(fj) != 1) + 1
        for a, b in zip(np.r_[0, holes[:-1]], holes):
            self._out.append(self._decimate(fj[a:b], ft[a:b], fx[a:b]))
        if len(holes):
            h = holes[-1]
            fj, ft, fx = fj[h:], ft[h:], fx[h:]
        self._fine_j, self._fine_t, self._fine_x = fj, ft, fx

    def _decimate(
        self, fj: np.ndarray, ft: np.ndarray, fx: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Outputs of a contiguous run of fine values whose FIR window lies inside the run."""
        q, half = self.q, self._half_fir
        none = (np.empty(0, np.int64), np.empty(0), np.empty((0, self.n_channels)))
        if len(fj) < 2 * half + 1:
            return none
        i0 = -(-(fj[0] + half) // q)
        i1 = (fj[-1] - half) // q
        if i1 < i0:
            return none
        i = np.arange(i0, i1 + 1, dtype=np.int64)
        at = i * q - fj[0]
        if q == 1:  # the outputs are a contiguous run of the fine points
            return i, ft[at[0]: at[-1] + 1], fx[at[0]: at[-1] + 1]
        # the FIR only at the kept points (upfirdn's down-sampling); the zeros in front align
        # its output grid with ours and reach no output that is kept
        pad = (-2 * half) % q
        seg = fx[at[0] - half: at[-1] + half + 1]
        seg = np.concatenate((np.zeros((pad, seg.shape[1])), seg))
        y = signal.upfirdn(self.fir, seg, up=1, down=q, axis=0)
        first = (2 * half + pad) // q
        return i, ft[at], y[first: first + len(i)]

    def _decimate_ready(self) -> None:
        """Outputs whose FIR window is complete; keep the fine values later outputs need."""
        fj = self._fine_j
        if len(fj) == 0:
            return
        i, t, vals = self._decimate(fj, self._fine_t, self._fine_x)
        if len(i):
            self._out.append((i, t, vals))
            cut = int(np.searchsorted(fj, (i[-1] + 1) * self.q - self._half_fir))
            self._fine_j, self._fine_t = fj[cut:], self._fine_t[cut:]
            self._fine_x = self._fine_x[cut:]

    def _trim_samples(self) -> None:
        if len(self._ts) == 0:
            return
        if len(self._pend_t):
            t_need = self._pend_t[0]
        elif len(self._te):
            t_need = self._te[0]
        else:
            t_need = self._ts[-1] - self.max_buffer_s
        u = np.interp(t_need, self._ts, np.arange(len(self._ts), dtype=float))
        cut = max(0, int(np.floor(u)) - _HALF - 2)
        if cut:
            self._ts, self._xs = self._ts[cut:], self._xs[cut:]

    def _collect(self) -> AngleSamples:
        outs = [o for o in self._out if len(o[0])]
        self._out = []
        if not outs:
            return AngleSamples(np.empty(0, np.int64), np.empty(0), np.empty((0, self.n_channels)))
        return AngleSamples(*(np.concatenate([o[k] for o in outs]) for k in range(3)))

    # -- public ----------------------------------------------------------------------------
    def push(
        self, t_samples: ArrayLike, x: ArrayLike, t_edges: ArrayLike, angle_edges: ArrayLike,
        valid: ArrayLike | None = None,
    ) -> AngleSamples:
        """Add accelerometer samples and tooth edges; return the grid points now final.

        Parameters
        ----------
        t_samples : (n,) array_like
            Sample times, s, increasing.
        x : (n,) or (n, c) array_like
            Samples (c = ``n_channels``).
        t_edges, angle_edges : (m,) array_like
            Tooth edge times, s, and their cumulative crank angles, degrees.
        valid : (m,) array_like of bool, optional
            False where an edge's angle is not to be trusted (ends the stretch there).
        """
        ts = np.asarray(t_samples, dtype=float).reshape(-1)
        xs = np.asarray(x, dtype=float)
        if xs.ndim == 1:
            xs = xs[:, None]
        if xs.shape != (len(ts), self.n_channels):
            raise InputError(
                f"x must have shape ({len(ts)}, {self.n_channels}) to match t_samples, "
                f"got {np.shape(x)}"
            )
        te = np.asarray(t_edges, dtype=float).reshape(-1)
        th = np.asarray(angle_edges, dtype=float).reshape(-1)
        ok = np.ones(len(te), bool) if valid is None else np.asarray(valid, bool).reshape(-1)
        if th.shape != te.shape or ok.shape != te.shape:
            raise InputError(
                f"t_edges, angle_edges and valid must have equal lengths, got {te.shape}, "
                f"{th.shape}, {ok.shape}"
            )
        if len(ts):
            self._ts = np.concatenate((self._ts, ts))
            self._xs = np.concatenate((self._xs, xs))
        self._add_edges(te, th, ok)
        self._interpolate(final=False)
        self._decimate_ready()
        self._trim_samples()
        return self._collect()

    def _add_edges(self, te: np.ndarray, th: np.ndarray, ok: np.ndarray) -> None:
        ok = ok & np.isfinite(te) & np.isfinite(th)
        start = 0
        while start < len(te):
            prev_th = self._th[-1] if len(self._th) else -np.inf
            prev_te = self._te[-1] if len(self._te) else -np.inf
            th_all = np.concatenate(([prev_th], th[start:]))
            te_all = np.concatenate(([prev_te], te[start:]))
            dth = np.diff(th_all)
            good = ok[start:] & (dth > 0) & (dth <= self.max_step_deg) & (np.diff(te_all) > 0)
            good[0] |= len(self._th) == 0 and bool(ok[start])  # first edge of a stretch
            stop = start + (int(np.argmin(good)) if not good.all() else len(good))
            self._th = np.concatenate((self._th, th[start:stop]))
            self._te = np.concatenate((self._te, te[start:stop]))
            if stop < len(te):
                self._end_stretch()
                if ok[stop]:  # a backwards step starts the next stretch with this edge
                    self._th, self._te = th[stop:stop + 1], te[stop:stop + 1]
                stop += 1
            else:
                self._emit_times(final=False)
            start = stop
            self._interpolate(final=False)

    def finish(self) -> AngleSamples:
        """Everything still held: the last stretch's end, then the last points."""
        self._end_stretch()
        self._interpolate(final=True)
        self._decimate_ready()
        self._fine_j, self._fine_t = np.empty(0, np.int64), np.empty(0)
        self._fine_x = np.empty((0, self.n_channels))
        self._pend_j, self._pend_t = np.empty(0, np.int64), np.empty(0)
        return self._collect()

    def sample_gap(self) -> AngleSamples:
        """Samples were lost after the last one pushed: read out what the samples so far can
        give, then forget them, so that no point is read across the gap. Edges are kept."""
        if len(self._ts):
            k = int(np.searchsorted(self._pend_t, self._ts[-1], side="right"))
            rest_j, rest_t = self._pend_j[k:], self._pend_t[k:]
            self._pend_j, self._pend_t = self._pend_j[:k], self._pend_t[:k]
            self._interpolate(final=True)
            self._pend_j, self._pend_t = rest_j, rest_t
            self._decimate_ready()
        self._ts, self._xs = np.empty(0), np.empty((0, self.n_channels))
        return self._collect()

    def reset(self) -> AngleSamples:
        """End everything held (as :meth:`finish`) and drop the sample history too."""
        out = self.finish()
        self._ts, self._xs = np.empty(0), np.empty((0, self.n_channels))
        return out


def resample_to_angle(
    t_samples: ArrayLike, x: ArrayLike, t_edges: ArrayLike, angle_edges: ArrayLike, *,
    fs: float, samples_per_rev: int = 64, rpm_floor: float = 1000.0,
    valid: ArrayLike | None = None,
) -> AngleSamples:
    """Resample a whole record onto the crank-angle grid (one push of :class:`AngleResampler`).

    Parameters
    ----------
    t_samples : (n,) array_like
        Sample times, s.
    x : (n,) or (n, c) array_like
        Samples.
    t_edges, angle_edges : (m,) array_like
        Tooth edge times, s, and their cumulative crank angles, degrees.
    fs : float
        Nominal sampling rate, Hz.
    samples_per_rev : int
        Grid points per crank revolution.
    rpm_floor : float
        Lowest alias-free speed, rpm.
    valid : (m,) array_like of bool, optional
        False at edges whose angle is not trusted.

    Returns
    -------
    AngleSamples
        ``index`` (grid index, angle = index · 360 / samples_per_rev), ``t`` and ``x`` (k, c).
    """
    xs = np.asarray(x, dtype=float)
    n_ch = 1 if xs.ndim == 1 else xs.shape[1]
    r = AngleResampler(fs=fs, samples_per_rev=samples_per_rev, rpm_floor=rpm_floor,
                       n_channels=n_ch, max_buffer_s=np.inf)
    a = r.push(t_samples, xs, t_edges, angle_edges, valid)
    b = r.finish()
    fields = ("index", "t", "x")
    return AngleSamples(*(np.concatenate((getattr(a, f), getattr(b, f))) for f in fields))


def _window(name: str, n: int) -> np.ndarray:
    if name not in ("hann", "flattop", "boxcar"):
        raise InputError(f"window must be 'hann', 'flattop' or 'boxcar', got {name!r}")
    return signal.get_window(name, n, fftbins=True)


def order_spectrum(
    x_angle: ArrayLike, *, samples_per_rev: int, revs_per_block: int = 8,
    window: Window = "hann", average: Literal["power", "none"] = "power",
    detrend: Detrend = "none", axis: int = -1,
) -> tuple[np.ndarray, np.ndarray]:
    """Amplitude spectrum in engine orders of a signal on the crank-angle grid.

    The record is cut into consecutive blocks of ``revs_per_block`` revolutions (a trailing
    partial block is left out), windowed and transformed. Amplitudes are peak values: a sine of
    amplitude A at an order that falls on a line gives A there (the window's coherent gain is
    divided out). Lines are ``1 / revs_per_block`` orders apart: 2 revolutions resolve the half
    orders of a 4-stroke, 8 give a clean separation with a Hann window.

    Parameters
    ----------
    x_angle : array_like
        Samples on the angle grid, along ``axis``.
    samples_per_rev : int
        Grid points per revolution.
    revs_per_block : int
        Revolutions per transform block, >= 2.
    window : {"hann", "flattop", "boxcar"}
        Block window. ``"flattop"`` keeps the amplitude of orders between lines within 0.1 %.
    average : {"power", "none"}
        ``"power"``: r.m.s. average of the block amplitudes; ``"none"``: one row per block.
    detrend : {"none", "constant", "linear"}
        Removed from each block before the window (``"linear"`` keeps gravity and slow
        attitude changes out of the lowest lines).
    axis : int
        The angle axis.

    Returns
    -------
    orders : (n_orders,) ndarray
        Orders of the lines, per crank revolution.
    amplitude : ndarray
        Shape of ``x_angle`` with ``axis`` replaced by (n_orders,) for ``"power"``, or by
        (n_blocks, n_orders) for ``"none"``. Same unit as ``x_angle``.
    """
    x = np.moveaxis(np.asarray(x_angle, dtype=float), axis, -1)
    if samples_per_rev < 2 or revs_per_block < 2:
        raise InputError(
            f"samples_per_rev and revs_per_block must be >= 2, got {samples_per_rev!r}, "
            f"{revs_per_block!r}"
        )
    if average not in ("power", "none"):
        raise InputError(f"average must be 'power' or 'none', got {average!r}")
    n_block = samples_per_rev * revs_per_block
    n_blocks = x.shape[-1] // n_block
    if n_blocks == 0:
        raise InputError(
            f"need at least one block of {n_block} angle samples ({revs_per_block} rev), "
            f"got {x.shape[-1]}"
        )
    blocks = x[..., : n_blocks * n_block].reshape(*x.shape[:-1], n_blocks, n_block)
    if detrend not in ("none", "constant", "linear"):
        raise InputError(f"detrend must be 'none', 'constant' or 'linear', got {detrend!r}")
    amp = _block_amplitude(blocks, _window(window, n_block), detrend)
    orders = np.arange(n_block // 2 + 1) / revs_per_block
    if average == "power":
        amp = np.sqrt(np.mean(amp**2, axis=-2))
        return orders, np.moveaxis(amp, -1, axis) if axis not in (-1, x.ndim - 1) else amp
    return orders, amp


def _block_amplitude(blocks: np.ndarray, w: np.ndarray, detrend: str = "none") -> np.ndarray:
    """Peak amplitude per line of each block (last axis), window ``w``.

    The detrend is done in the spectrum: the transform of ``w·(x - a - b·n)`` is
    ``F(w·x) - a·F(w) - b·F(w·n)``, with a and b the least-squares line of each row.
    """
    spec = np.fft.rfft(blocks * w, axis=-1)
    if detrend != "none":  # gravity and slow lean changes would leak into the lowest lines
        n = np.arange(blocks.shape[-1]) - (blocks.shape[-1] - 1) / 2
        spec = spec - blocks.mean(axis=-1, keepdims=True) * np.fft.rfft(w)
        if detrend == "linear":
            slope = (blocks * n).sum(axis=-1, keepdims=True) / np.sum(n * n)
            spec = spec - slope * np.fft.rfft(w * n)
    amp = np.abs(spec) / np.sum(w)
    amp[..., 1:] *= 2.0
    if blocks.shape[-1] % 2 == 0:
        amp[..., -1] /= 2.0  # the Nyquist line, like DC, is not a folded pair
    return amp


@dataclass
class OrderMapResult:
    """An rpm-vs-order map: r.m.s.-averaged block spectra per rpm band.

    Attributes
    ----------
    rpm_lo, rpm_hi : (n_bands,) float64
        Band edges, rpm.
    orders : (n_orders,) float64
        Line orders.
    amplitude : (n_bands, c, n_orders) float64
        Peak amplitude per band, channel and order (NaN in bands without blocks).
    blocks : (n_bands,) int64
        Blocks averaged in each band.
    """

    rpm_lo: np.ndarray
    rpm_hi: np.ndarray
    orders: np.ndarray
    amplitude: np.ndarray
    blocks: np.ndarray

    def band_spectrum(self, band: int, *, combine: Literal["vector", "max"] = "vector"
                      ) -> np.ndarray:
        """One band's spectrum with the channels combined (root-sum-square or largest)."""
        a = self.amplitude[band]
        return np.sqrt(np.sum(a**2, axis=0)) if combine == "vector" else np.max(a, axis=0)

    def overall(self) -> np.ndarray:
        """Block-weighted r.m.s. spectrum over all bands, (c, n_orders)."""
        w = self.blocks.astype(float)
        if w.sum() == 0:
            return np.full(self.amplitude.shape[1:], np.nan)
        p = np.nan_to_num(self.amplitude**2) * w[:, None, None]
        return np.sqrt(p.sum(axis=0) / w.sum())


class OrderMap:
    """Streaming rpm-vs-order map over angle-grid samples (from :class:`AngleResampler`).

    Blocks line up with the crank: block b holds grid indices ``[b·N, (b+1)·N)`` with
    ``N = samples_per_rev · revs_per_block``; a block with a missing point is left out. The
    block's speed is its revolutions over the time it spans.

    Parameters
    ----------
    samples_per_rev, revs_per_block, window, detrend
        As for :func:`order_spectrum` (here ``detrend`` defaults to ``"linear"``).
    rpm_band : float
        Band width, rpm.
    rpm_range : (float, float)
        First band's lower edge and last band's upper edge, rpm.
    n_channels : int
        Channels of the angle samples.
    """

    def __init__(
        self, *, samples_per_rev: int = 64, revs_per_block: int = 8, window: Window = "hann",
        rpm_band: float = 500.0, rpm_range: tuple[float, float] = (1000.0, 11000.0),
        n_channels: int = 1, detrend: Detrend = "linear",
    ) -> None:
        lo, hi = rpm_range
        if not (rpm_band > 0 and 0 <= lo < hi):
            raise InputError(f"need rpm_band > 0 and 0 <= lo < hi, got {rpm_band!r}, {rpm_range!r}")
        if samples_per_rev < 2 or revs_per_block < 2:
            raise InputError(
                f"samples_per_rev and revs_per_block must be >= 2, got {samples_per_rev!r}, "
                f"{revs_per_block!r}"
            )
        self.samples_per_rev, self.revs_per_block = int(samples_per_rev), int(revs_per_block)
        self.n_block = self.samples_per_rev * self.revs_per_block
        self.edges = np.arange(lo, hi + 0.5 * rpm_band, rpm_band)
        self.w = _window(window, self.n_block)
        if detrend not in ("none", "constant", "linear"):
            raise InputError(f"detrend must be 'none', 'constant' or 'linear', got {detrend!r}")
        self.detrend = detrend
        self.n_channels = int(n_channels)
        n_bands, n_orders = len(self.edges) - 1, self.n_block // 2 + 1
        self._power = np.zeros((n_bands, self.n_channels, n_orders))
        self._count = np.zeros(n_bands, dtype=np.int64)
        self._idx = np.empty(0, np.int64)
        self._t = np.empty(0)
        self._x = np.empty((0, self.n_channels))

    def push(self, samples: AngleSamples) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Add angle samples; return the blocks completed: (block index, rpm, amplitude).

        ``amplitude`` has shape (n_new_blocks, c, n_orders). A block is complete once a later
        block's point (or a step back in the grid index: a new stretch) has been seen.
        """
        idx = np.concatenate((self._idx, samples.index))
        t = np.concatenate((self._t, samples.t))
        x = np.concatenate((self._x, samples.x.reshape(len(samples.index), -1)))
        back = np.flatnonzero(np.diff(idx) <= 0)
        cut = back[0] + 1 if len(back) else len(idx)
        first = self._take(idx[:cut], t[:cut], x[:cut], final=bool(len(back)))
        if not len(back):
            return first
        self._idx, self._t = np.empty(0, np.int64), np.empty(0)
        self._x = np.empty((0, self.n_channels))
        rest = self.push(AngleSamples(idx[cut:], t[cut:], x[cut:]))
        joined = tuple(np.concatenate((p, q)) for p, q in zip(first, rest))
        return joined  # type: ignore[return-value]

    def _take(self, idx: np.ndarray, t: np.ndarray, x: np.ndarray, *, final: bool
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        nb = self.n_block
        blk = idx // nb
        done = np.ones(len(idx), bool) if final else blk < (blk[-1] if len(blk) else 0)
        b_ids, starts, counts = np.unique(blk[done], return_index=True, return_counts=True)
        full = (counts == nb) & (idx[starts] == b_ids * nb)  # increasing, so contiguous
        sel = starts[full]
        keep = ~done
        self._idx, self._t, self._x = idx[keep], t[keep], x[keep]
        if len(sel) == 0:
            return (np.empty(0, np.int64), np.empty(0),
                    np.empty((0, self.n_channels, nb // 2 + 1)))
        xc = np.ascontiguousarray(x.T)  # (c, n): blocks are contiguous rows
        blocks = np.stack([xc[:, a: a + nb] for a in sel])  # (k, c, nb)
        # revolutions over the block's span, first point to the next block's first
        dt = (t[sel + nb - 1] - t[sel]) * nb / (nb - 1)
        rpm = 60.0 * self.revs_per_block / dt
        amp = _block_amplitude(blocks, self.w, self.detrend)  # (k, c, n_orders)
        band = np.searchsorted(self.edges, rpm, side="right") - 1
        inside = (band >= 0) & (band < len(self._count))
        np.add.at(self._power, band[inside], amp[inside] ** 2)
        np.add.at(self._count, band[inside], 1)
        return b_ids[full], rpm, amp

    def result(self) -> OrderMapResult:
        """The map as it stands (blocks completed so far)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            amp = np.sqrt(self._power / self._count[:, None, None])
        amp[self._count == 0] = np.nan
        return OrderMapResult(self.edges[:-1].copy(), self.edges[1:].copy(),
                              np.arange(self.n_block // 2 + 1) / self.revs_per_block, amp,
                              self._count.copy())

    def finish(self) -> OrderMapResult:
        """Take the last block if it is complete, then the map."""
        self._take(self._idx, self._t, self._x, final=True)
        return self.result()


def order_map(samples: AngleSamples, **options: object) -> OrderMapResult:
    """Whole-record rpm-vs-order map: one push of :class:`OrderMap` (same options)."""
    n_ch = samples.x.shape[1] if samples.x.ndim == 2 else 1
    m = OrderMap(n_channels=n_ch, **options)  # type: ignore[arg-type]
    m.push(samples)
    return m.finish()


def compare_orders(
    orders: ArrayLike, amplitude: ArrayLike, predicted: list[dict[str, float | str]], *,
    tolerance: float = 0.05, floor_rel: float = 0.05, prominence: float = 3.0,
    min_order: float = 0.5, max_order: float = 6.0,
) -> dict[str, list[dict[str, float | str]]]:
    """Predicted order lines against a measured spectrum.

    Parameters
    ----------
    orders, amplitude : (n_orders,) array_like
        A measured spectrum (e.g. :meth:`OrderMapResult.band_spectrum`).
    predicted : list of dict
        Entries with ``order``, ``source`` and ``magnitude``, as from
        :func:`dsp.layout.predicted_orders`.
    tolerance : float
        Half-width, orders, within which a line counts as the predicted one.
    floor_rel : float
        Measured peaks below this fraction of the largest peak are not reported.
    prominence : float
        A peak must also exceed this many times the median of the lines within one order
        around it (its own line and the two on either side left out): broadband road noise
        makes local maxima too, but no lines that stand out. Lines within two lines of a
        predicted order are left out of that median.
    min_order, max_order : float
        Orders looked at (a 4-stroke's lowest engine order is 0.5: below it is road and noise).

    Returns
    -------
    dict
        ``"predicted"``: each predicted entry with ``measured`` (largest amplitude within the
        tolerance); ``"unpredicted"``: local peaks above the floor that no prediction explains,
        with ``order`` and ``amplitude``; ``"dominant"``: all such peaks, strongest first.
    """
    o = np.asarray(orders, dtype=float)
    a = np.asarray(amplitude, dtype=float)
    if o.shape != a.shape or o.ndim != 1:
        raise InputError(
            f"orders and amplitude must be 1-d of equal length, got {o.shape}, {a.shape}"
        )
    if not tolerance > 0:
        raise InputError(f"tolerance must be > 0, got {tolerance!r}")
    look = (o >= min_order - tolerance) & (o <= max_order + tolerance) & (o > 0)
    av = np.where(look, np.nan_to_num(a), 0.0)
    out_pred = []
    for p in predicted:
        near = np.abs(o - float(p["order"])) <= tolerance
        out_pred.append({**p, "measured": float(np.max(av[near])) if near.any() else float("nan")})
    # local maxima (ties go to the first) above the floor
    left = np.concatenate(([-np.inf], av[:-1]))
    right = np.concatenate((av[1:], [-np.inf]))
    peak = look & (av > left) & (av >= right)
    step = o[1] - o[0] if len(o) > 1 else 1.0
    reach = max(int(round(1.0 / step)), 3)
    pred_orders = np.array([float(p["order"]) for p in predicted]) if predicted else np.empty(0)
    # lines that belong to a predicted order (with the window's spread) are not noise
    busy = np.zeros(len(o), bool)
    for po in pred_orders:
        busy |= np.abs(o - po) <= max(tolerance, 2.01 * step)
    for i in np.flatnonzero(peak):
        near = np.abs(np.arange(len(o)) - i)
        around = av[(near <= reach) & (near > 2) & ~busy & (o > tolerance)]
        if len(around) and av[i] < prominence * np.median(around):
            peak[i] = False
    floor = floor_rel * (av[peak].max() if peak.any() else 0.0)
    peak &= av >= floor
    k = np.flatnonzero(peak)
    k = k[np.argsort(-av[k], kind="stable")]
    dominant, unpredicted = [], []
    for i in k:
        row = {"order": float(o[i]), "amplitude": float(av[i])}
        dominant.append(row)
        if not np.any(np.abs(pred_orders - o[i]) <= tolerance):
            unpredicted.append(row)
    return {"predicted": out_pred, "unpredicted": unpredicted, "dominant": dominant}
