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
