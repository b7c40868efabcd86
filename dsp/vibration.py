"""VibrationAnalyzer: the streaming object the pipeline calls for all of the vibration work.

Per accelerometer board it keeps, in bounded memory:

* the weighted acceleration of each axis (ISO 8041 filters with carried state): Wh on every
  axis of a bar or footpeg board (hand-arm, ISO 5349-1), Wk on the vertical and Wd on the
  horizontal axes of a seat board (ISO 2631-1); boards elsewhere get no weighting;
* the band-limited unweighted acceleration (the weighting's high-pass and low-pass alone);
* their mean squares per rpm band (rpm from the crank edges), and for the whole run;
* an rpm-vs-order map from the order-tracked signal (:mod:`dsp.orders`);
* rough-road spans (:mod:`dsp.roughroad`).

Accelerometer samples wait until the crank edges cover their time (the crank stage may run a
little behind) and are then processed in batches of about ``batch_s`` of crank time;
:meth:`VibrationAnalyzer.finish` takes the rest with an unknown rpm. Input is in g (as sources
yield it); every output is in m/s². Streaming and one push of everything give the same samples
in the same bands, the same order maps and spans bit for bit; the r.m.s. values agree to
rounding (sums of squares accumulated batch by batch).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from crankbeat.dsp.engine import Engine
from crankbeat.dsp.orders import AngleResampler, OrderMap
from crankbeat.dsp.roughroad import RoughRoadDetector
from crankbeat.dsp.weighting import (
    G_N,
    WHOLE_BODY_K,
    band_limiting_sos,
    daily_exposure,
    weighting_sos,
)
from crankbeat.errors import InputError

HAND_ARM = ("bar", "footpeg")
#: Crank time kept behind the newest edge for accelerometer samples still on their way, s.
EDGE_KEEP_S = 10.0
DIRECTIONS = ("forward", "back", "left", "right", "up", "down")
AXIS_NAMES = ("x", "y", "z")

#: One row per sensor, rpm band and axis (axis "sum" is the vector sum of the three).
BAND_DTYPE = np.dtype([
    ("sensor", "U32"),
    ("rpm_lo", "f8"),  # rpm; NaN for the "all" rows of the run totals
    ("rpm_hi", "f8"),
    ("axis", "U4"),  # x, y, z or sum
    ("direction", "U8"),  # forward, left, up, ...; "" for sum
    ("weighting", "U8"),  # Wh, Wk, Wd, none; "Wd+Wk" for a seat's sum
    ("rms", "f8"),  # weighted r.m.s., m/s² (NaN when not weighted)
    ("rms_unweighted", "f8"),  # band-limited r.m.s., m/s²
    ("samples", "i8"),
    ("seconds", "f8"),
])


@dataclass(frozen=True)
class SensorSpec:
    """An accelerometer board as the vibration work needs it.

    ``location`` is one of the rig's locations (bar, seat, footpeg, tank, frame, engine);
    ``axes`` the bike direction of sensor x, y, z (forward, back, left, right, up, down);
    ``fs`` the sampling rate, Hz.
    """

    name: str
    location: str
    axes: tuple[str, str, str]
    fs: float

    def __post_init__(self) -> None:
        if len(self.axes) != 3 or any(a not in DIRECTIONS for a in self.axes):
            raise InputError(
                f"sensor {self.name!r}: axes must be three of {DIRECTIONS}, got {self.axes!r}"
            )
        if not (np.isfinite(self.fs) and self.fs > 0):
            raise InputError(f"sensor {self.name!r}: fs must be > 0 Hz, got {self.fs!r}")

    @classmethod
    def of(cls, sensor: Any) -> "SensorSpec":
        """From any object with ``name``, ``location``, ``axes`` and ``sample_rate_hz`` (a rig's
        serial sensor)."""
        return cls(sensor.name, sensor.location, tuple(sensor.axes), float(sensor.sample_rate_hz))

    def weightings(self) -> tuple[str, str, str]:
        """Weighting of each axis: Wh, Wk, Wd or "none"."""
        if self.location in HAND_ARM:
            return ("Wh", "Wh", "Wh")
        if self.location == "seat":
            kinds = tuple("Wk" if a in ("up", "down") else "Wd" for a in self.axes)
            return kinds  # type: ignore[return-value]
        return ("none", "none", "none")

    def vector_k(self) -> tuple[float, float, float]:
        """Axis multipliers of the vector sum: 1 for hand-arm; 1.4 horizontal, 1 vertical (seat)."""
        if self.location == "seat":
            return tuple(WHOLE_BODY_K[2] if a in ("up", "down") else WHOLE_BODY_K[0]
                         for a in self.axes)  # type: ignore[return-value]
        return (1.0, 1.0, 1.0)


@dataclass
class VibrationStep:
    """What one push produced."""

    rough_spans: dict[str, list[tuple[float, float]]] = field(default_factory=dict)
    samples_done: dict[str, int] = field(default_factory=dict)  # samples accounted this push
    t_done: dict[str, float] = field(default_factory=dict)  # s, samples accounted up to here
    order_blocks: dict[str, int] = field(default_factory=dict)  # order blocks completed


@dataclass
class VibrationSummary:
    """The run's vibration results, ready to be written as rows.

    Attributes
    ----------
    bands : ndarray of BAND_DTYPE
        Per sensor, rpm band (with samples) and axis, plus the vector sum.
    totals : ndarray of BAND_DTYPE
        Per sensor and axis for the whole run (rpm_lo/hi NaN), every sample, rpm known or not.
    exposure : dict sensor -> float
        Daily exposure A(8) for ``riding_hours`` of this vibration, m/s² (hand-arm: a_hv;
        seat: ISO 2631-1 vector sum; NaN elsewhere).
    riding_hours : float
        The stated daily riding time the exposure is for.
    orders : (n_orders,) ndarray
        Order lines of the spectra.
    order_rpm_lo, order_rpm_hi : (n_bands,) ndarray
        Bands of the order maps, rpm.
    order_amplitude : dict sensor -> (n_bands, 3, n_orders) ndarray
        Peak amplitude per band, axis and order, m/s² (unweighted; NaN in empty bands).
    order_blocks : dict sensor -> (n_bands,) ndarray
        Blocks averaged per band.
    rough_spans : dict sensor -> list of (t_start, t_end)
        Rough-road spans seen by each board, s.
    rough_spans_all : list of (t_start, t_end)
        Their union.
    """

    bands: np.ndarray
    totals: np.ndarray
    exposure: dict[str, float]
    riding_hours: float
    orders: np.ndarray
    order_rpm_lo: np.ndarray
    order_rpm_hi: np.ndarray
    order_amplitude: dict[str, np.ndarray]
    order_blocks: dict[str, np.ndarray]
    rough_spans: dict[str, list[tuple[float, float]]]
    rough_spans_all: list[tuple[float, float]]

    def rows(self) -> list[dict[str, Any]]:
        """Band and total rows as plain dicts (for a store)."""
        names = BAND_DTYPE.names or ()
        return [{n: r[n].item() for n in names} for r in np.concatenate((self.bands, self.totals))]


def merge_spans(spans: list[tuple[float, float]]) -> list[tuple[float, float]]:
    """Union of closed intervals, sorted."""
    out: list[tuple[float, float]] = []
    for a, b in sorted(spans):
        if out and a <= out[-1][1]:
            out[-1] = (out[-1][0], max(out[-1][1], b))
        else:
            out.append((a, b))
    return out


class _Board:
    """The state kept for one accelerometer board."""

    def __init__(self, spec: SensorSpec, engine: Engine, edges: np.ndarray, *,
                 samples_per_rev: int, revs_per_block: int, rpm_floor: float,
                 rough_options: dict[str, Any]) -> None:
        self.spec = spec
        fs = spec.fs
        self.kinds = spec.weightings()
        # axes that share a weighting are filtered together: (kind, axes, sos_w, sos_u)
        self.groups = []
        for kind in sorted(set(self.kinds)):
            axes = [c for c in range(3) if self.kinds[c] == kind]
            sos_w = weighting_sos(kind, fs) if kind != "none" else None  # type: ignore[arg-type]
            band = "Wh" if kind == "none" else kind
            sos_u = band_limiting_sos(band, fs)  # type: ignore[arg-type]
            # steady-state states for a unit input, scaled at each (re)start after a gap
            zi1_w = None if sos_w is None else signal.sosfilt_zi(sos_w)[:, :, None]
            zi1_u = signal.sosfilt_zi(sos_u)[:, :, None]
            self.groups.append((kind, axes, sos_w, sos_u, zi1_w, zi1_u))
        self.zi: list[tuple[np.ndarray | None, np.ndarray] | None] = [None] * len(self.groups)
        n_bands = len(edges) - 1
        self.sq_w = np.zeros((n_bands, 3))
        self.sq_u = np.zeros((n_bands, 3))
        self.count = np.zeros(n_bands, np.int64)
        self.tot_w = np.zeros(3)
        self.tot_u = np.zeros(3)
        self.tot_n = 0
        self.resampler = AngleResampler(fs=fs, samples_per_rev=samples_per_rev,
                                        rpm_floor=rpm_floor, n_channels=3)
        self.orders = OrderMap(samples_per_rev=samples_per_rev, revs_per_block=revs_per_block,
                               rpm_band=float(edges[1] - edges[0]),
                               rpm_range=(float(edges[0]), float(edges[-1])), n_channels=3)
        self.rough = RoughRoadDetector(fs, **rough_options)
        self.spans: list[tuple[float, float]] = []
        # samples waiting for the crank to cover them
        self.t = np.empty(0)
        self.x = np.empty((0, 3))
        self.gap = np.empty(0, bool)

    def filter(self, x: np.ndarray, gap: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Weighted and band-limited samples (m/s²), restarting the filters at gaps."""
        yw = np.full_like(x, np.nan)
        yu = np.empty_like(x)
        starts = np.flatnonzero(gap)
        bounds = np.r_[0, starts[starts > 0], len(x)]
        for a, b in zip(bounds[:-1], bounds[1:]):
            for g, (_, axes, sos_w, sos_u, zi1_w, zi1_u) in enumerate(self.groups):
                seg = x[a:b, axes]
                if gap[a] or self.zi[g] is None:  # start settled on the present value
                    x0 = seg[0][None, None, :]
                    self.zi[g] = (None if zi1_w is None else zi1_w * x0, zi1_u * x0)
                zw, zu = self.zi[g]  # type: ignore[misc]
                yu[a:b, axes], zu = signal.sosfilt(sos_u, seg, axis=0, zi=zu)
                if sos_w is not None:
                    yw[a:b, axes], zw = signal.sosfilt(sos_w, seg, axis=0, zi=zw)
                self.zi[g] = (zw, zu)
        return yw, yu


class VibrationAnalyzer:
    """Streaming vibration analysis of a run (see the module docstring).

    Parameters
    ----------
    engine : Engine
        The engine (its cycle sets how crank angles are unwrapped).
    sensors : list of SensorSpec
        The accelerometer boards.
    rpm_band : float
        Width of the rpm bands, rpm.
    rpm_range : (float, float)
        Lower edge of the first band and upper edge of the last, rpm.
    riding_hours : float
        Daily riding time the exposure A(8) is stated for, h.
    samples_per_rev, revs_per_block, rpm_floor
        Order tracking (see :mod:`dsp.orders`). ``samples_per_rev=None`` picks, per board, the
        smallest even grid that runs at least at the fastest board's rate down to ``rpm_floor``
        (120 for 2 kHz and 1000 rpm), so that no order-domain filter is needed.
    rough_options : dict, optional
        Keyword options of :class:`dsp.roughroad.RoughRoadDetector`.
    max_edge_gap_s : float
        Edges further apart than this give no rpm between them.
    batch_s : float
        Samples are processed once the crank has advanced this much (CAN time) since the last
        time: pushes of 0.2 s would spend most of their time in per-call overheads. Results
        (and rough-road spans) come at most this much later; ``VibrationStep.t_done`` says how
        far each board has been accounted.
    """

    def __init__(
        self, engine: Engine, sensors: list[SensorSpec], *, rpm_band: float = 500.0,
        rpm_range: tuple[float, float] = (1000.0, 11000.0), riding_hours: float = 1.0,
        samples_per_rev: int | None = None, revs_per_block: int = 8, rpm_floor: float = 1000.0,
        rough_options: dict[str, Any] | None = None, max_edge_gap_s: float = 0.1,
        batch_s: float = 1.0,
    ) -> None:
        lo, hi = rpm_range
        if not (rpm_band > 0 and 0 <= lo < hi):
            raise InputError(f"need rpm_band > 0 and 0 <= lo < hi, got {rpm_band!r}, {rpm_range!r}")
        if not riding_hours >= 0:
            raise InputError(f"riding_hours must be >= 0, got {riding_hours!r}")
        names = [s.name for s in sensors]
        if len(set(names)) != len(names):
            raise InputError(f"sensor names must be unique, got {names}")
        self.engine = engine
        self.edges = np.arange(lo, hi + 0.5 * rpm_band, rpm_band)
        self.riding_hours = float(riding_hours)
        self.max_edge_gap_s = float(max_edge_gap_s)
        if samples_per_rev is None:  # one grid for all boards: one set of order lines
            fs_max = max((s.fs for s in sensors), default=2000.0)
            samples_per_rev = 2 * int(np.ceil(fs_max * 60.0 / rpm_floor / 2 - 1e-9))
        self.samples_per_rev = int(samples_per_rev)
        self.boards = {
            s.name: _Board(s, engine, self.edges, samples_per_rev=self.samples_per_rev,
                           revs_per_block=revs_per_block, rpm_floor=rpm_floor,
                           rough_options=dict(rough_options or {}))
            for s in sensors
        }
        # crank edges still needed for the rpm of waiting samples
        self._te = np.empty(0)
        self._th = np.empty(0)
        self._ok = np.empty(0, bool)
        self._unwrap = 0.0
        self._last_raw = np.nan
        self.batch_s = float(batch_s)
        self._last_flush = -np.inf
        self._feed: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []

    def rough_verdict_lag_s(self) -> float:
        """Longest time after a sample until its rough-road verdict is known, s (0: no boards).

        A span is reported when it closes: one detector window, the hold time and two frames.
        """
        return max((b.rough.window_frames * b.rough.frame_s + b.rough.hold_s
                    + 2 * b.rough.frame_s for b in self.boards.values()), default=0.0)

    def weighted_energy(self) -> dict[str, tuple[float, int, float, str]]:
        """Per sensor, what was weighted so far: ``(energy, samples, fs, weighting)``.

        ``energy`` is the sum over samples of the vector-sum weighted acceleration squared
        ((m/s²)², the axes' k factors applied); the r.m.s. over a stretch is the square root of
        the energy's growth over the samples' growth. ``fs`` in Hz; ``weighting`` of the first
        axis ("Wh", "Wk", "Wd" or "none").
        """
        out = {}
        for name, b in self.boards.items():
            k = np.asarray(b.spec.vector_k(), dtype=float)
            out[name] = (float(np.sum(k**2 * b.tot_w)), int(b.tot_n), float(b.spec.fs),
                         b.kinds[0])
        return out

    def rough_open_since(self) -> float | None:
        """Start (CAN time, s) of the earliest rough-road span still open, or None."""
        starts = [b.rough.open_since for b in self.boards.values()
                  if b.rough.open_since is not None]
        return min(starts) if starts else None

    # -- crank --------------------------------------------------------------------------
    def _add_crank(self, te: np.ndarray, th: np.ndarray, ok: np.ndarray) -> np.ndarray:
        """Unwrap angles that restart each cycle (a drop of more than half a cycle)."""
        cyc = self.engine.cycle_deg
        raw = np.concatenate(([self._last_raw], th))
        drop = np.diff(raw) < -cyc / 2
        if len(drop):
            drop[0] = drop[0] and np.isfinite(self._last_raw)
        th_u = th + self._unwrap + cyc * np.cumsum(drop)
        if len(th):
            self._unwrap += cyc * float(np.sum(drop))
            self._last_raw = float(th[-1])
        self._te = np.concatenate((self._te, te))
        self._th = np.concatenate((self._th, th_u))
        self._ok = np.concatenate((self._ok, ok))
        return th_u

    def _rpm_at(self, t: np.ndarray) -> np.ndarray:
        """Crank speed of the edge interval holding each time, rpm (NaN where unknown)."""
        te, th, ok = self._te, self._th, self._ok
        rpm = np.full(len(t), np.nan)
        if len(te) < 2:
            return rpm
        k = np.searchsorted(te, t, side="right") - 1
        inside = (k >= 0) & (k < len(te) - 1)
        kk = k[inside]
        dt = te[kk + 1] - te[kk]
        dth = th[kk + 1] - th[kk]
        good = ok[kk] & ok[kk + 1] & (dt > 0) & (dt <= self.max_edge_gap_s)
        good &= (dth > 0) & (dth <= 120.0)  # a re-phased crank jumps by 360°: no speed there
        vals = np.where(good, (th[kk + 1] - th[kk]) / np.where(dt > 0, dt, 1.0) / 6.0, np.nan)
        rpm[inside] = vals
        return rpm

    # -- public -------------------------------------------------------------------------
    def push(
        self, accel: dict[str, tuple[ArrayLike, ...]],
        crank: tuple[ArrayLike, ArrayLike, ArrayLike],
    ) -> VibrationStep:
        """Add accelerometer samples and crank edges.

        Parameters
        ----------
        accel : dict sensor name -> (t, xyz) or (t, xyz, gap_before)
            Samples since the last push: times (n,) s, acceleration (n, 3) g, and optionally
            (n,) bool, True where samples were lost just before.
        crank : (t_edges, angle_edges, valid)
            Tooth edges since the last push: times (m,) s, crank angles (m,) degrees (cumulative,
            or restarting each cycle), and (m,) bool trust flags.
        """
        te, th, ok = (np.asarray(v).reshape(-1) for v in crank)
        te, th, ok = te.astype(float), th.astype(float), ok.astype(bool)
        if not (len(te) == len(th) == len(ok)):
            raise InputError(
                f"crank arrays must have equal lengths, got {len(te)}, {len(th)}, {len(ok)}"
            )
        for name in accel:
            if name not in self.boards:
                raise InputError(f"unknown sensor {name!r}; expected one of {sorted(self.boards)}")
        th_u = self._add_crank(te, th, ok)
        self._feed.append((te, th_u, ok))
        for name, data in accel.items():
            self._queue(self.boards[name], data)
        step = VibrationStep()
        t_cover = self._te[-1] if len(self._te) else -np.inf
        if t_cover - self._last_flush >= self.batch_s:
            self._flush(t_cover, step)
        return step

    def _flush(self, t_cover: float, step: VibrationStep) -> None:
        """Process every sample the crank covers (whole batches: numpy works per call)."""
        feed = self._feed or [(np.empty(0), np.empty(0), np.empty(0, bool))]
        te, th, ok = (np.concatenate([f[k] for f in feed]) for k in range(3))
        self._feed = []
        for board in self.boards.values():
            angle = board.resampler.push(np.empty(0), np.empty((0, 3)), te, th, ok)
            self._orders(board, angle, step)
            self._process(board, t_cover, step)
        self._trim_crank()
        self._last_flush = t_cover

    def _queue(self, board: _Board, data: tuple) -> None:
        t = np.asarray(data[0], dtype=float).reshape(-1)
        x = np.asarray(data[1], dtype=float)
        gap = (np.asarray(data[2], bool).reshape(-1) if len(data) > 2
               else np.zeros(len(t), bool))
        if x.shape != (len(t), 3) or gap.shape != t.shape:
            raise InputError(
                f"sensor {board.spec.name!r}: xyz must be ({len(t)}, 3) and gap_before "
                f"({len(t)},) to match t, got {x.shape} and {gap.shape}"
            )
        board.t = np.concatenate((board.t, t))
        board.x = np.concatenate((board.x, x))
        board.gap = np.concatenate((board.gap, gap))

    def _process(self, board: _Board, t_cover: float, step: VibrationStep) -> None:
        n = int(np.searchsorted(board.t, t_cover, side="left"))  # rpm needs an edge after t
        name = board.spec.name
        step.samples_done[name] = n
        if n == 0:
            return
        t, x_g, gap = board.t[:n], board.x[:n], board.gap[:n]
        x = x_g * G_N
        board.t, board.x, board.gap = board.t[n:], board.x[n:], board.gap[n:]
        step.t_done[name] = float(t[-1])
        rpm = self._rpm_at(t)
        yw, yu = board.filter(x, gap)
        band = np.searchsorted(self.edges, rpm, side="right") - 1
        inside = np.isfinite(rpm) & (band >= 0) & (band < len(board.count))
        bi, nb = band[inside], len(board.count)
        for c in range(3):
            board.sq_w[:, c] += np.bincount(bi, weights=yw[inside, c] ** 2, minlength=nb)
            board.sq_u[:, c] += np.bincount(bi, weights=yu[inside, c] ** 2, minlength=nb)
        board.count += np.bincount(bi, minlength=nb)
        board.tot_w += np.sum(yw**2, axis=0)
        board.tot_u += np.sum(yu**2, axis=0)
        board.tot_n += n
        rough = board.rough.push(t, x_g, rpm)
        board.spans += rough.closed
        step.rough_spans[name] = rough.closed
        # order tracking: restart at sample gaps, the read-out must not bridge them
        bounds = np.r_[0, np.flatnonzero(gap[1:]) + 1, n]
        for a, b in zip(bounds[:-1], bounds[1:]):
            if a > 0:
                self._orders(board, board.resampler.sample_gap(), step)
            angle = board.resampler.push(t[a:b], x[a:b], np.empty(0), np.empty(0))
            self._orders(board, angle, step)

    def _orders(self, board: _Board, angle: Any, step: VibrationStep) -> None:
        if len(angle):
            ids, _, _ = board.orders.push(angle)
            name = board.spec.name
            step.order_blocks[name] = step.order_blocks.get(name, 0) + len(ids)

    def _trim_crank(self) -> None:
        # Samples reach us later than the crank (the serial clock fit looks ahead by a second or
        # two), so keep a margin of edges for those still on their way, not only for the waiting.
        newest = self._te[-1] if len(self._te) else np.inf
        t_need = min((b.t[0] for b in self.boards.values() if len(b.t)),
                     default=newest - EDGE_KEEP_S)
        t_need = min(t_need, newest - EDGE_KEEP_S)
        keep_from = int(np.searchsorted(self._te, t_need, side="right")) - 2
        keep_from = min(max(keep_from, 0), max(len(self._te) - 2, 0))
        self._te, self._th, self._ok = (a[keep_from:] for a in (self._te, self._th, self._ok))

    def finish(self) -> VibrationSummary:
        """Account the samples still waiting (rpm unknown past the last edge) and summarise."""
        step = VibrationStep()
        self._flush(np.inf, step)
        for board in self.boards.values():
            self._orders(board, board.resampler.finish(), step)
            board.spans += board.rough.finish().closed
        return self._summary()

    def _summary(self) -> VibrationSummary:
        bands, totals = [], []
        amp, blocks, spans, exposure = {}, {}, {}, {}
        orders = lo_o = hi_o = np.empty(0)
        for name, b in self.boards.items():
            spec = b.spec
            with np.errstate(invalid="ignore", divide="ignore"):
                rms_w = np.sqrt(b.sq_w / b.count[:, None])
                rms_u = np.sqrt(b.sq_u / b.count[:, None])
            for i in np.flatnonzero(b.count):
                bands += self._rows(spec, self.edges[i], self.edges[i + 1], rms_w[i], rms_u[i],
                                    int(b.count[i]))
            n = max(b.tot_n, 1)
            tw, tu = np.sqrt(b.tot_w / n), np.sqrt(b.tot_u / n)
            totals += self._rows(spec, np.nan, np.nan, tw, tu, b.tot_n)
            total_w = float(np.sqrt(np.sum((np.asarray(spec.vector_k()) * tw) ** 2)))
            exposure[name] = (float(daily_exposure(total_w, self.riding_hours))
                              if spec.weightings()[0] != "none" and b.tot_n else float("nan"))
            m = b.orders.result()
            orders, lo_o, hi_o = m.orders, m.rpm_lo, m.rpm_hi
            amp[name], blocks[name] = m.amplitude, m.blocks
            spans[name] = list(b.spans)
        all_spans = merge_spans([s for v in spans.values() for s in v])
        return VibrationSummary(np.array(bands, BAND_DTYPE), np.array(totals, BAND_DTYPE),
                                exposure, self.riding_hours, orders, lo_o, hi_o, amp, blocks,
                                spans, all_spans)

    def _rows(self, spec: SensorSpec, lo: float, hi: float, rms_w: np.ndarray,
              rms_u: np.ndarray, n: int) -> list[tuple]:
        kinds = spec.weightings()
        secs = n / spec.fs
        k = np.asarray(spec.vector_k())
        rows = [(spec.name, lo, hi, AXIS_NAMES[c], spec.axes[c], kinds[c],
                 float(rms_w[c]) if kinds[c] != "none" else np.nan, float(rms_u[c]), n, secs)
                for c in range(3)]
        label = "+".join(sorted(set(kinds)))
        sum_w = float(np.sqrt(np.sum((k * rms_w) ** 2))) if kinds[0] != "none" else np.nan
        rows.append((spec.name, lo, hi, "sum", "", label if kinds[0] != "none" else "none",
                     sum_w, float(np.sqrt(np.sum((k * rms_u) ** 2))), n, secs))
        return rows
