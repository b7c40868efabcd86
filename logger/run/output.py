"""What the analysis of a run returns: :class:`RunOutput` (whole run) and :class:`RunTail`.

Both are plain values (numpy arrays, lists, dicts): picklable, so that a worker process or a
cluster node can send them back to the one process that writes the store.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.events import EVENT_DTYPE
from crankbeat.logger.chunks import StreamHealth
from crankbeat.logger.notes import decisive_notes, ranked_notes, stream_fields
from crankbeat.logger.run.masking import mask_events
from crankbeat.logger.run.notes import tooth_notes
from crankbeat.logger.run.teeth import LearntTeeth


@dataclass(frozen=True)
class Priors:
    """What a run is told from outside: today the wheel's tooth errors (deg per real tooth),
    learnt on earlier runs of the wheel, or None. A batch gives all its rides the same priors."""

    tooth_errors_deg: np.ndarray | None = None


@dataclass(frozen=True)
class Source:
    """One input file of a run: path, SHA-256 of its bytes, kind ("can" or "accel:NAME")."""

    path: str
    sha256: str
    kind: str


@dataclass
class RunTail:
    """The parts of a run known only at its end."""

    intervals: list[dict]
    vibration: list[dict]
    order_maps: list[dict]  # keyword arguments of Store.add_order_map
    teeth: LearntTeeth
    summary: dict
    rough_spans: list[tuple[float, float]]
    notes: list[str]


@dataclass
class RunOutput:
    """The whole analysis of one run.

    Attributes
    ----------
    rig_name, wheel_key, analyser : str
    sources : list of Source
    events : ndarray of EVENT_DTYPE
        Every event in order, rough-road masking applied.
    windows : dict kind -> list of dict
        Misfire-rate windows ("rev200", "rev1000", "rpm-band").
    channels : dict name -> (t, value)
        Status channels at 10 Hz (s, channel unit).
    tail : RunTail
        Intervals, vibration, order maps, learnt tooth errors, summary (with the layout check
        and the stream's health), notes.
    """

    rig_name: str
    wheel_key: str
    analyser: str
    sources: list[Source]
    events: np.ndarray
    windows: dict[str, list[dict]]
    channels: dict[str, tuple[np.ndarray, np.ndarray]]
    tail: RunTail
    extra: dict = field(default_factory=dict)

    @property
    def summary(self) -> dict:
        return self.tail.summary

    @property
    def notes(self) -> list[str]:
        return self.tail.notes

    @property
    def teeth(self) -> LearntTeeth:
        return self.tail.teeth

    @property
    def t_start(self) -> float | None:
        return self.tail.summary.get("t_start")


def join_events(parts: list[np.ndarray], spans: list[tuple[float, float]]) -> np.ndarray:
    """The steps' events as one array, masked by the run's rough-road spans (like the store)."""
    ev = np.concatenate(parts) if parts else np.zeros(0, EVENT_DTYPE)
    mask_events(ev, spans)
    return ev


def conclude(analysis) -> RunTail:
    """The tail of a finished :class:`logger.run.analysis.RunAnalysis` (no I/O)."""
    s = analysis.summary
    notes = list(analysis.notes)
    interval_rows, interval_notes = analysis.firing.interval_rows(
        analysis.tooth_correction_applied)
    notes += interval_notes
    summary = s.as_dict()
    found = analysis.events.verdict_report()  # dead/unusable cylinders, depth scale, inertia
    summary["detector"] = {
        "inertia_kgm2": found["inertia_kgm2"], "rig_inertia_kgm2": found["rig_inertia_kgm2"],
        **({"inertia_note": found["inertia_note"]} if found.get("inertia_note") else {}),
        # first seen dead, s into the ride (CAN time of the first crank edge = 0)
        "dead_since_s": {str(c): round(t - (summary.get("t_start") or 0.0), 2)
                         for c, t in found["dead"].items()},
        "unusable": {str(c): why for c, why in found["unusable"].items()},
        "depth_calibrated": {str(c): ok for c, ok in found["depth_calibrated"].items()},
    }
    notes = found["notes"] + notes
    layout = analysis.firing.layout()
    if layout is not None:
        summary["layout_check"].update(best=layout.families[0][0], matches_rig=layout.fits_rig,
                                       scores={n: round(v, 4) for n, v in layout.families})
        notes += [layout.note()] if layout.note() else []
    vib = analysis.vib_summary
    vibration, order_maps = [], []
    if vib is not None:
        vibration = vibration_rows(vib)
        order_maps = order_map_rows(vib)
        summary["vibration_exposure"] = {
            "riding_hours": vib.riding_hours, "a8_m_s2": vib.exposure}
    teeth = analysis.teeth.learnt()
    summary["tooth_errors"] = teeth.as_dict()
    notes = tooth_notes(applied=analysis.tooth_correction_applied, learnt=teeth) + notes
    rough = list(analysis.rough_spans)
    summary["rough_road"] = {"spans": len(rough), "seconds": float(sum(b - a for a, b in rough))}
    health: StreamHealth = analysis.health
    # every stream counter as a field; the notes that bound the run's trust first, never cut
    summary["stream"] = stream_fields(health, analysis.watch, analysis.live_fields)
    summary["notes"] = ranked_notes(decisive_notes(summary["stream"]),
                                    notes + list(health.notes))
    limit = analysis.rig.limits.misfire_alert_pct
    worst = summary["misfire"]["worst_rev200_pct"]
    # no alert from a rig file whose layout the engine clearly does not fit (None: not judged)
    summary["misfire"]["alert"] = bool(worst is not None and worst > limit
                                       and summary["layout_check"]["matches_rig"] is not False)
    summary["misfire"]["alert_limit_pct"] = limit
    return RunTail(interval_rows, vibration, order_maps, teeth, summary, rough,
                   summary["notes"])


def vibration_rows(vib) -> list[dict]:
    rows = []
    for r in vib.rows():
        weighted = r["weighting"] not in ("none", "")
        rows.append({
            "sensor": r["sensor"], "rpm_lo": r["rpm_lo"], "rpm_hi": r["rpm_hi"],
            "axis": r["axis"], "weighting": r["weighting"] if weighted else "none",
            "rms": r["rms"] if weighted else r["rms_unweighted"], "n": int(r["samples"]),
        })
    return rows


def order_map_rows(vib) -> list[dict]:
    """Order maps per sensor and axis (and the axes' root sum of squares, axis "sum")."""
    out = []
    for name, amp in vib.order_amplitude.items():
        if not amp.size:
            continue
        common = {"sensor": name, "rpm_lo": vib.order_rpm_lo, "rpm_hi": vib.order_rpm_hi,
                  "orders": vib.orders}
        for a, axis in enumerate(("x", "y", "z")):
            out.append({**common, "amplitude": amp[:, a, :], "axis": axis})
        out.append({**common, "amplitude": np.sqrt(np.sum(amp**2, axis=1)), "axis": "sum"})
    return out
