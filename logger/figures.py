"""The one place the views (show, trend, compare, the report's tables and figures) take a run's
firing-interval, window and contribution figures from, so that they never disagree.

* Firing intervals: the run's interval check (``intervals`` table) is the figure. When a
  tooth-error correction learnt mid-run took effect at CAN time ``t0`` (kept in the summary as
  ``intervals_from_t``), intervals before ``t0`` carry the wheel's spacing errors: any view that
  works from the events takes only the events from ``t0`` on (:func:`interval_events`).
* Revolution windows: the stored windows; a run without them gets
  :func:`dsp.analysis.window_rates` on its events with the engine of its own stored rig file.
* Contribution: the mean over fired events (1.0 = the engine's typical firing event).
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.analysis import window_rates
from crankbeat.dsp.events import FIRED
from crankbeat.logger.store import Store


def intervals_from_t(summary: dict | None) -> float | None:
    """CAN time (s) from which the run's firing intervals are corrected (None = all of it)."""
    value = (summary or {}).get("intervals_from_t")
    return float(value) if isinstance(value, int | float) else None


def ride_start(store: Store, run_id: int, ev: np.ndarray | None = None) -> float:
    """Time zero of every "s into the ride" axis and table: the summary's CAN start time, else
    the first event's time, else 0."""
    t0 = (store.run(run_id).get("summary") or {}).get("t_start")
    if isinstance(t0, int | float) and np.isfinite(t0):
        return float(t0)
    ev = store.events(run_id) if ev is None else ev
    finite = ev["t"][np.isfinite(ev["t"])] if len(ev) else np.zeros(0)
    return float(finite.min()) if finite.size else 0.0


def wheel_corrected(summary: dict | None) -> bool:
    """Whether the run's firing intervals are on a corrected wheel (a correction from an
    earlier run, or one learnt during this run); runs stored without that record count as yes."""
    teeth = (summary or {}).get("tooth_errors")
    if not isinstance(teeth, dict):
        return True
    return bool(teeth.get("applied_from_earlier_run") or teeth.get("applied_during_run"))


def interval_events(ev: np.ndarray, summary: dict | None) -> np.ndarray:
    """Fired events with an observed and expected interval, from the corrected part only."""
    ok = (ev["verdict"] == FIRED) & np.isfinite(ev["interval_deg"]) & \
        np.isfinite(ev["expected_interval_deg"])
    t0 = intervals_from_t(summary)
    if t0 is not None:
        ok &= ev["t"] >= t0
    return ev[ok]


def interval_error_by_cylinder(store: Store, run_id: int) -> dict[int, tuple[float, int]]:
    """Observed minus expected interval (deg) and its pair count, keyed by the cylinder the
    interval ends at, from the run's interval check."""
    return {r["to_cyl"]: (r["observed_deg"] - r["expected_deg"], int(r["n"] or 0))
            for r in store.intervals(run_id)
            if r["observed_deg"] is not None and r["expected_deg"] is not None}


def run_engine(store: Store, run_id: int):
    """The :class:`dsp.engine.Engine` of the rig file the run was analysed with."""
    from crankbeat.logger.rig.loader import parse_rig

    rig = parse_rig(store.rig_toml(run_id), label=f"run {run_id}", source="store")
    return rig.engine


def window_rows(store: Store, run_id: int, ev: np.ndarray, *, revolutions: int) -> list[dict]:
    """Per-cylinder window rows (idx, cylinder, rate, t_start, complete) of one window length:
    the stored ones, else :func:`dsp.analysis.window_rates` on the events."""
    kind = f"rev{revolutions}"
    stored = [w for w in store.windows(run_id, kind=kind) if w["cylinder"]]
    if stored:
        return stored
    if not len(ev):
        return []
    engine = run_engine(store, run_id)
    windows, per_cyl = window_rates(ev, revolutions=revolutions, engine=engine)
    cycles_per_window = revolutions / (engine.cycle_deg / 360.0)
    rows = []
    for w, pct in zip(windows, per_cyl, strict=True):
        idx = int(round(w["start_cycle"] / cycles_per_window))
        for c, rate in enumerate(pct, start=1):
            rows.append({"idx": idx, "cylinder": c, "t_start": float(w["t_start"]),
                         "rate": None if not np.isfinite(rate) else float(rate),
                         "complete": bool(w["complete"])})
    return rows


def cylinder_pairs(store: Store, run_id: int) -> dict[int, str]:
    """When the run's 720° phase stayed unknown (no cam, even firing), each cylinder's events
    may be its 360°-partner's: ``"2/3"`` = cylinder 2, or 3 if the phase is the other way round;
    ``{}`` when the phase is known."""
    notes = ((store.run(run_id).get("summary") or {}).get("notes")) or []
    if not any("720° phase unknown" in str(n) for n in notes):
        return {}
    from crankbeat.dsp.layout import firing_angles

    engine = run_engine(store, run_id)
    if engine.cycle_deg != 720.0:
        return {}
    angles = np.asarray(firing_angles(engine), dtype=float) % 720.0
    out = {}
    for i, a in enumerate(angles):
        partner = np.flatnonzero(np.isclose((angles - a) % 720.0, 360.0, atol=0.5))
        if partner.size:
            out[i + 1] = f"{i + 1}/{int(partner[0]) + 1}"
    return out


def cylinder_name(cylinder: int, pairs: dict[int, str]) -> str:
    """``"2/3"`` where the phase is unknown, else the cylinder number."""
    return pairs.get(int(cylinder), str(cylinder))


def window_timeline(store: Store, run_id: int, ev: np.ndarray, *, revolutions: int) -> dict:
    """Revolution windows against time, from :func:`dsp.analysis.window_rates` on the events
    with the engine of the run's own rig file (the figures the run's alert was judged on).

    Returns a dict of arrays, one entry per window: ``t_start``, ``t_end`` (s into the ride),
    ``rate_pct`` (all cylinders together, the alert's figure), ``complete`` (the window spans
    its full number of revolutions; only those are judged) and ``per_cylinder`` (n_win, n_cyl).
    """
    engine = run_engine(store, run_id)
    windows, per_cyl = window_rates(ev, revolutions=revolutions, engine=engine)
    t0 = ride_start(store, run_id, ev)
    return {"t_start": windows["t_start"] - t0, "t_end": windows["t_end"] - t0,
            "rate_pct": windows["rate_pct"], "complete": windows["complete"],
            "per_cylinder": per_cyl}


def order_grid(store: Store, run_id: int, sensor: str, axis: str, *, max_order: float
               ) -> dict | None:
    """The stored order map of one sensor and axis on a regular rpm grid: ``orders`` (n_o,),
    ``rpm_edges`` (n_b + 1,) spaced evenly by the store's band width from the lowest to the
    highest visited band, ``amplitude`` (n_b, n_o) m/s², NaN in bands never visited. Every band
    is equally wide, the low-rpm ones included. None without data."""
    cells = _grid_cells([m for m in store.order_maps(run_id, sensor=sensor)
                         if m["axis"] == axis], max_order)
    if cells is None:
        return None
    rpm_lo, rpm_hi, order, amp = cells
    width = float(np.min(rpm_hi - rpm_lo))
    lo, hi = float(np.min(rpm_lo)), float(np.max(rpm_hi))
    n_bands = int(round((hi - lo) / width))
    orders = np.unique(order)
    grid = np.full((n_bands, orders.size), np.nan)
    column = np.searchsorted(orders, order)
    first = np.rint((rpm_lo - lo) / width).astype(int)
    last = np.rint((rpm_hi - lo) / width).astype(int)
    for a, b, k, v in zip(first.tolist(), last.tolist(), column.tolist(), amp.tolist()):
        # a stored band wider than the finest one fills each fine row it covers
        grid[a:b, k] = v
    return {"orders": orders, "rpm_edges": lo + width * np.arange(n_bands + 1),
            "amplitude": grid}


def _grid_cells(maps: list[dict], max_order: float) -> tuple[np.ndarray, ...] | None:
    """The cells of ``maps`` (Store.order_maps) that go on a grid: bands and order known,
    order <= ``max_order``, amplitude a number other than 0; as flat arrays ``(rpm_lo, rpm_hi,
    order, amplitude)`` by rpm_lo, then order (a later band overwrites an earlier one where a
    coarse band covers fine rows). None without any."""
    parts = []
    for m in maps:
        n_b, n_o = m["amplitude"].shape
        cell = (np.repeat(m["rpm_lo"], n_o), np.repeat(m["rpm_hi"], n_o),
                np.tile(m["orders"], n_b), m["amplitude"].ravel())
        with np.errstate(invalid="ignore"):
            keep = (np.isfinite(cell[0]) & np.isfinite(cell[1]) & (cell[2] <= max_order)
                    & np.isfinite(cell[3]) & (cell[3] != 0))
        parts.append([c[keep] for c in cell])
    if not parts or not sum(len(p[0]) for p in parts):
        return None
    rpm_lo, rpm_hi, order, amp = (np.concatenate(c) for c in zip(*parts))
    by = np.lexsort((order, rpm_lo))
    return rpm_lo[by], rpm_hi[by], order[by], amp[by]


def predicted_order_marks(engine, *, max_order: float) -> list[dict]:
    """Orders the engine layout predicts (:func:`dsp.layout.predicted_orders`), one entry per
    order: ``order``, ``sources`` (firing pulses / free force / free couple) and ``strength``
    0..1 (firing pulses: relative to a cylinder's pulse train; forces and couples count 1).

    Firing pulses weaker than half a pulse train are left out: they stay in the data but would
    crowd the map (a twin-270 also excites 0.5, 3.5 and 4.5 at 0.38)."""
    from crankbeat.dsp.layout import predicted_orders

    words = {"torque": "firing pulses", "force": "free force", "couple": "free couple"}
    found: dict[float, dict] = {}
    for p in predicted_orders(engine, max_order=max_order):
        order = float(p["order"])
        if order > max_order or (p["source"] == "torque" and p["magnitude"] < 0.5):
            continue
        strength = float(p["magnitude"]) if p["source"] == "torque" else 1.0
        mark = found.setdefault(order, {"order": order, "sources": [], "strength": 0.0})
        mark["sources"].append(words[str(p["source"])])
        mark["strength"] = max(mark["strength"], strength)
    return sorted(found.values(), key=lambda m: m["order"])


def main_orders(marks: list[dict], *, count: int = 4) -> list[float]:
    """The orders worth a cut against rpm: the ``count`` lowest predicted ones (a twin-270's
    first order and its half orders 1.5 and 2.5; a flat-plane four's 2, 4 and 6)."""
    return [m["order"] for m in marks[:count]]


def order_cuts(grid: dict, orders: list[float]) -> dict[float, tuple[np.ndarray, np.ndarray]]:
    """Amplitude of each order against engine speed: ``{order: (band centre rpm, m/s²)}`` from
    the order bin nearest each order (visited bands only)."""
    centres = 0.5 * (grid["rpm_edges"][:-1] + grid["rpm_edges"][1:])
    out = {}
    for o in orders:
        j = int(np.argmin(np.abs(grid["orders"] - o)))
        amp = grid["amplitude"][:, j]
        ok = np.isfinite(amp)
        out[float(o)] = (centres[ok], amp[ok])
    return out


def interval_pairs(ev: np.ndarray, summary: dict | None, engine) -> list[dict]:
    """The events of :func:`interval_events` split by firing pair, in firing order from
    cylinder 1: ``from_cyl`` (the cylinder that fired before), ``to_cyl``, ``expected_deg``
    (what the layout promises) and ``observed_deg`` (array of the pair's intervals)."""
    from crankbeat.dsp.layout import firing_sequence

    used = interval_events(ev, summary)
    seq = [int(c) for c in firing_sequence(engine)[0]]
    out = []
    for i, c in enumerate(seq):
        sel = used[used["cylinder"] == c]
        expected = float(np.median(sel["expected_interval_deg"])) if len(sel) else np.nan
        out.append({"from_cyl": seq[i - 1], "to_cyl": c, "expected_deg": expected,
                    "observed_deg": np.asarray(sel["interval_deg"], dtype=float)})
    return out


#: Status channels the channel view draws, in this order (those the run stored).
VIEW_CHANNELS = ("rpm", "throttle", "gear", "road_speed", "coolant")


def spans_of(t: np.ndarray, gap_s: float) -> list[tuple[float, float]]:
    """Runs of times no more than ``gap_s`` apart, as (first, last) pairs."""
    t = np.sort(t[np.isfinite(t)])
    if not t.size:
        return []
    cut = np.flatnonzero(np.diff(t) > gap_s)
    starts = np.concatenate([[0], cut + 1])
    ends = np.concatenate([cut, [t.size - 1]])
    return [(float(t[a]), float(t[b])) for a, b in zip(starts, ends, strict=True)]


def channel_view(store: Store, run_id: int, ev: np.ndarray | None = None) -> dict:
    """Everything the time-aligned channel view draws, times in s into the ride: ``channels``
    ({name: (t, value)} of :data:`VIEW_CHANNELS` the run stored), ``events`` (the run's events
    with ``t`` shifted), ``masked_spans`` (runs of masked events: the rough-road masks, events
    less than 0.5 s apart joined), ``fuel_cut_spans`` (runs of events on overrun fuel cut,
    joined the same way), ``correction_from`` (s where the tooth-error correction took effect,
    None if it held from the start or never)."""
    from crankbeat.dsp.events import FUEL_CUT, MASKED

    ev = store.events(run_id) if ev is None else ev
    t0 = ride_start(store, run_id, ev)
    stored = store.channels(run_id, names=VIEW_CHANNELS)
    channels = {n: (stored[n][0] - t0, stored[n][1]) for n in VIEW_CHANNELS if n in stored}
    shifted = ev.copy()
    shifted["t"] = shifted["t"] - t0
    masked = shifted["t"][shifted["verdict"] == MASKED]
    t_fix = intervals_from_t(store.run(run_id).get("summary"))
    cut = shifted["t"][shifted["verdict"] == FUEL_CUT]
    return {"channels": channels, "events": shifted, "masked_spans": spans_of(masked, 0.5),
            "fuel_cut_spans": spans_of(cut, 0.5),
            "correction_from": None if t_fix is None else t_fix - t0}


def event_neighbourhood(ev: np.ndarray, index: int, *, cycles: int = 10) -> dict:
    """The events of the ``cycles`` working cycles either side of event ``index``: ``events``,
    ``centre`` (its position among them) and ``reference`` (median metric of its cylinder's
    fired events over the whole run: what that cylinder's combustion usually looks like)."""
    from crankbeat.dsp.events import FIRED

    e = ev[index]
    near = np.flatnonzero(np.abs(ev["cycle"] - e["cycle"]) <= cycles)
    own = ev[(ev["cylinder"] == e["cylinder"]) & (ev["verdict"] == FIRED)]
    ref = float(np.nanmedian(own["metric"])) if len(own) else float("nan")
    return {"events": ev[near], "centre": int(np.flatnonzero(near == index)[0]),
            "reference": ref}


def event_at(ev: np.ndarray, t_ride: float, t0: float, *, cylinder: int | None = None) -> int:
    """Index of the event nearest ``t_ride`` s into the ride (of ``cylinder`` if given)."""
    cand = np.flatnonzero(np.isfinite(ev["t"]) & (
        True if cylinder is None else ev["cylinder"] == cylinder))
    if not cand.size:
        raise ValueError("no event with a time")
    return int(cand[np.argmin(np.abs(ev["t"][cand] - t0 - t_ride))])


#: The speed curve of the event zoom spans this much crank angle around the event's TDC, deg:
#: its compression before and its expansion (where a misfire shows) after
ZOOM_SPAN_DEG = (-180.0, 360.0)


def event_crank(store: Store, run_id: int, index: int, *, cycles: int = 2,
                reference_cycles: int = 10) -> dict:
    """The raw crank data around event ``index``, read again from the run's CAN recording.

    Returns a dict; ``why`` (str) says what is missing when the recording cannot be read
    (moved, deleted: then nothing else is filled). Otherwise, times in s into the ride:

    * ``t``, ``period_ms``, ``teeth``: every tooth period of the ``cycles`` working cycles
      either side (the period that ended at that edge, as the bike sent it) and the tooth
      pitches it spans (1, or ``missing + 1`` across the wheel's gap);
    * ``tdcs``: ``(t, cylinder)`` of each firing TDC in that span (from the stored events);
    * ``angle``, ``rpm``: the crank speed over :data:`ZOOM_SPAN_DEG` around the event's TDC,
      each period at the middle of its tooth interval, deg from TDC and rpm;
    * ``ref_angle``, ``ref_rpm``, ``ref_count``: its cylinder's reference, the median speed
      curve of the same cylinder's fired events within ``reference_cycles`` cycles (this event
      left out), moved to this event's mean speed over the span.
    """
    import warnings

    from crankbeat.dsp.crank import reconstruct_crank
    from crankbeat.dsp.layout import firing_angles
    from crankbeat.logger.rig.loader import parse_rig

    ev = store.events(run_id)
    e = ev[index]
    can = [s["path"] for s in store.run(run_id)["sources"] if s["kind"] == "can"]
    if not can:
        return {"why": "the run keeps no CAN recording"}
    from pathlib import Path

    if not Path(can[0]).is_file():
        return {"why": f"its CAN recording {can[0]} is not there any more"}
    rig = parse_rig(store.rig_toml(run_id), label=f"run {run_id}", source="store")
    near = ev[np.abs(ev["cycle"] - e["cycle"]) <= reference_cycles]
    lo, hi = float(np.nanmin(near["t"])) - 0.5, float(np.nanmax(near["t"])) + 0.3
    teeth = _teeth_between(rig, can[0], lo, hi)
    if teeth is None:
        return {"why": f"its CAN recording {can[0]} holds no tooth frames at the event"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # an unknown phase is in the run's own notes
        angles = reconstruct_crank(*teeth, rig.wheel, rig.engine)
    ok = angles.valid & np.isfinite(angles.period)
    t0 = ride_start(store, run_id, ev)
    fire = np.asarray(firing_angles(rig.engine), dtype=float)

    def tdc_angle(event) -> float:
        # the firing TDC nearest the crank angle at the event's time: found by time, so that a
        # phase this reading numbers one revolution apart from the run's (no cam, even firing)
        # cannot move the event by 360 deg
        a = float(np.interp(event["t"], angles.t[ok], angles.angle[ok]))
        cand = fire + rig.engine.cycle_deg * np.round((a - fire) / rig.engine.cycle_deg)
        return float(cand[np.argmin(np.abs(cand - a))])

    step = np.diff(angles.angle, prepend=np.nan)
    mid = angles.angle - 0.5 * step
    rpm = step / angles.period / 6.0
    good = ok & np.isfinite(rpm)

    def curve(event):
        rel = mid[good] - tdc_angle(event)
        sel = (rel >= ZOOM_SPAN_DEG[0]) & (rel <= ZOOM_SPAN_DEG[1])
        return rel[sel], rpm[good][sel]

    span = np.abs(ev["cycle"] - e["cycle"]) <= cycles
    shown = (angles.t >= np.nanmin(ev["t"][span]) - 0.01) & \
        (angles.t <= np.nanmax(ev["t"][span]) + 0.01) & np.isfinite(angles.period)
    angle, speed = curve(e)
    grid = np.arange(ZOOM_SPAN_DEG[0], ZOOM_SPAN_DEG[1] + 1e-9, 2.0)
    refs = [r for r in near if r["cylinder"] == e["cylinder"] and r["verdict"] == FIRED
            and r["cycle"] != e["cycle"]]
    shapes = []
    for r in refs:
        a, s = curve(r)
        if a.size > 4 and a.min() <= grid[0] + 12 and a.max() >= grid[-1] - 12:
            shapes.append(np.interp(grid, a, s) - s.mean())
    ref = np.median(shapes, axis=0) + (speed.mean() if speed.size else 0.0) if shapes \
        else np.full(grid.shape, np.nan)
    pitches = np.rint(step / rig.wheel.pitch_deg)
    return {"why": "", "t": angles.t[shown] - t0, "period_ms": 1e3 * angles.period[shown],
            "teeth": np.where(np.isfinite(pitches), pitches, 1)[shown].astype(int),
            "tdcs": [(float(x["t"] - t0), int(x["cylinder"])) for x in ev[span]],
            "angle": angle, "rpm": speed, "ref_angle": grid, "ref_rpm": ref,
            "ref_count": len(shapes)}


def _teeth_between(rig, can_path, lo: float, hi: float):
    """(frame_time, periods, cam, lost_before) of the tooth frames received in [lo, hi] s."""
    from crankbeat.logger.stream import replay

    parts = []
    with replay(rig, can_path, None, chunk_s=2.0) as stream:
        for chunk in stream:
            tb = chunk.teeth
            if len(tb.frame_time) and tb.frame_time[0] > hi:
                break
            keep = (tb.frame_time >= lo) & (tb.frame_time <= hi)
            if keep.any():
                parts.append((tb.frame_time[keep], tb.periods[keep], tb.cam[keep],
                              tb.lost_before[keep]))
    if not parts:
        return None
    return tuple(np.concatenate([p[k] for p in parts]) for k in range(4))
