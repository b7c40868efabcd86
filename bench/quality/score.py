"""Score one analysed ride against its truth: counts per speed band, layout, intervals.

Rules (decided here, documented in bench/quality/README.md):

* Events are matched with :func:`dsp.scoring.score_misfire` (per cylinder, nearest in time). The
  analyser's times are on the CAN receive time base (latency and jitter on top of the true edge
  times), so the median offset between detected and true events is removed first.
* A four without a cam sensor cannot tell its two crank revolutions apart; when the analyser's
  cylinder numbering is one revolution off (its 1 is the truth's 4 on a flat four) the
  numbering that matches more events is taken, and the ride says so (``phase_flip``).
* A true partial burn (0 < burn fraction < 1) is left out of the misfire counts: calling it
  ``partial`` is right, ``misfire`` is counted apart (``partial_as_misfire``), neither is a false
  alarm on a healthy event. A true misfire called ``partial`` is a MISSED misfire.
* Detection and false alarms leave out events the analyser declared ``unusable``/``masked``/
  ``fuel_cut`` (their share is reported as ``unusable``); the dead-cylinder figure does not: a
  dead cylinder must come out as misfiring on every event.
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.layout import firing_angles
from crankbeat.dsp.scoring import score_misfire

BANDS = {
    "all": lambda tr: np.ones(len(tr), bool),
    "mid": lambda tr: (tr["rpm"] >= 2000) & (tr["rpm"] <= 9000),
    "high": lambda tr: (tr["rpm"] >= 8000) & (tr["rpm"] <= 10500) & (tr["throttle"] < 12),
}


def revolution_map(engine) -> np.ndarray | None:
    """Cylinder numbering one crank revolution on (index and value 1-based; [0] unused)."""
    ang = np.mod(np.asarray(firing_angles(engine)), 720.0)
    out = np.zeros(len(ang) + 1, dtype=np.int64)
    for k, a in enumerate(ang):
        hit = np.flatnonzero(np.isclose(np.mod(a + 360.0, 720.0), ang, atol=1e-6))
        if not hit.size:
            return None
        out[k + 1] = hit[0] + 1
    return out


def _align(det: dict, truth: np.ndarray) -> dict:
    """Remove the median receive-time offset of the detected events.

    Measured against the nearest true event of ANY cylinder (far less than a firing interval
    away), so that a cylinder numbering one revolution off cannot pull the clocks apart.
    """
    tt = np.sort(truth["t"])
    td = det["t"][np.isfinite(det["t"])]
    if tt.size < 2 or not td.size:
        return det
    i = np.clip(np.searchsorted(tt, td), 1, tt.size - 1)
    near = np.where(np.abs(tt[i - 1] - td) < np.abs(tt[i] - td), tt[i - 1], tt[i])
    return dict(det, t=det["t"] - float(np.median(td - near)))


def _truth_for_misfire(truth: np.ndarray) -> dict:
    partial = (truth["burn_fraction"] > 0) & (truth["burn_fraction"] < 1)
    return {"t": truth["t"], "cylinder": truth["cylinder"], "fired": truth["fired"],
            "fuel_cut": truth["fuel_cut"] | partial}


def _band_counts(det: dict, truth: np.ndarray, sel: np.ndarray) -> dict:
    tr = truth[sel]
    if not tr.size:
        return {}
    s = score_misfire(det, _truth_for_misfire(tr))
    ex = s.excluded_by_verdict
    matched = s.true_misfires + s.true_fired + s.excluded
    # Dead-cylinder style: every matched true misfire counts, whatever the verdict.
    raw = score_misfire({"t": det["t"], "cylinder": det["cylinder"],
                         "misfire": det["verdict"] == "misfire"}, _truth_for_misfire(tr))
    partial = (tr["burn_fraction"] > 0) & (tr["burn_fraction"] < 1)
    out = {"true_mis": s.true_misfires, "detected": s.detected_misfires,
           "true_fired": s.true_fired, "false_alarms": s.false_alarms,
           "unusable": ex.get("unusable", 0) + ex.get("masked", 0), "matched": matched,
           "unmatched_truth": s.unmatched_truth, "raw_true_mis": raw.true_misfires,
           "raw_detected": raw.detected_misfires, "partial_true": int(partial.sum())}
    if partial.any():
        pt = {"t": tr["t"][partial], "cylinder": tr["cylinder"][partial],
              "fired": np.zeros(int(partial.sum()), bool)}
        for name in ("misfire", "partial"):
            got = score_misfire({"t": det["t"], "cylinder": det["cylinder"],
                                 "misfire": det["verdict"] == name}, pt)
            out[f"partial_as_{name}"] = got.detected_misfires
    return out


def _intervals(show: dict, true_engine, cyl_map: np.ndarray, retard: dict[int, float]) -> dict:
    ang = np.mod(np.asarray(firing_angles(true_engine)), 720.0)
    errs, flagged, flagged_pairs = [], 0, []
    for row in show.get("intervals") or []:
        obs = row.get("observed_deg")
        a, b = int(cyl_map[row["from_cyl"]]), int(cyl_map[row["to_cyl"]])
        true = np.mod(ang[b - 1] - ang[a - 1], 720.0) or 720.0
        true += retard.get(b, 0.0) - retard.get(a, 0.0)
        if obs is not None and np.isfinite(obs):
            errs.append(float(obs) - true)
        if row.get("flagged"):
            flagged += 1
            flagged_pairs.append((a, b))
    return {"interval_err_deg": max((abs(e) for e in errs), default=None),
            "interval_judged": bool(errs), "interval_flagged": flagged,
            "retard_flagged": any(c in pair for pair in flagged_pairs for c in retard)}


def score_ride(kind: str, det: dict, truth: np.ndarray, show: dict, *, rig, true_engine,
               retard: dict[int, float]) -> dict:
    """Counts of one ride (JSON-able) for :mod:`bench.quality.table`."""
    det = _align(det, truth)
    n = rig.engine.n_cylinders
    ident = np.arange(n + 1)
    cyl_map, flip = ident, False
    rev = revolution_map(rig.engine)
    if rev is not None and not np.array_equal(rev, ident):
        mt = _truth_for_misfire(truth)
        a = score_misfire(det, mt).unmatched_truth
        b = score_misfire(dict(det, cylinder=rev[det["cylinder"]]), mt).unmatched_truth
        if b < a:
            cyl_map, flip = rev, True
    det = dict(det, cylinder=cyl_map[det["cylinder"]])
    summary = (show.get("run") or {}).get("summary") or {}
    lay = summary.get("layout_check") or {}
    mis = summary.get("misfire") or {}
    out = {"bands": {name: _band_counts(det, truth, f(truth)) for name, f in BANDS.items()},
           "misfire_verdicts": int((det["verdict"] == "misfire").sum()),
           "events": int(det["t"].size),
           "untimed": int((~np.isfinite(det["t"])).sum()),
           "layout_matches_rig": lay.get("matches_rig"), "layout_best": lay.get("best"),
           "alert": bool(mis.get("alert")), "phase_flip": flip}
    out.update(_intervals(show, true_engine, cyl_map, retard))
    return out
