"""`make quality`'s harness: it must score a known set of injected misfires exactly.

Detector targets are NOT asserted here (that is what `make quality` reports); these tests check
that the harness counts right, so that its table can be trusted.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger.rig import load_rig
from crankbeat.logger.sim import Fault, Physics, Scenario, Segment, WheelSpec, simulate

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.quality import score  # noqa: E402
from bench.quality.rides import KINDS, build_scenario  # noqa: E402
from bench.quality.run import run_ride  # noqa: E402
from bench.quality.table import build, render  # noqa: E402

Alder = load_rig("alder")
Larch = load_rig("larch")


@pytest.fixture(scope="module")
def alder_ride():
    faults = (Fault("misfire", 2, probability=0.05, start=0.3),
              Fault("misfire", 3, cycles=(20, 21, 22)),
              Fault("partial_burn", 4, probability=0.05, fraction=0.4, start=0.3))
    sc = Scenario(segments=(Segment(4.0, gear=3, rpm=(4000, 5000), throttle=(25, 30)),),
                  seed=21, faults=faults, physics=Physics(geared_inertia_kgm2=0.03),
                  wheel=WheelSpec(error_rms_deg=0.1))
    return simulate(Alder, sc)


def _as_detector(truth, *, flip=None, latency=0.0008, miss=(), false=(), partial_ok=True):
    """Events as a detector would give them: from the truth, with chosen mistakes."""
    verdict = np.where(truth["fired"], "fired", "misfire").astype(object)
    is_partial = (truth["burn_fraction"] > 0) & (truth["burn_fraction"] < 1)
    verdict[is_partial] = "partial" if partial_ok else "misfire"
    verdict[list(miss)] = "fired"
    verdict[list(false)] = "misfire"
    cyl = truth["cylinder"].astype(np.int64)
    if flip is not None:
        cyl = flip[cyl]
    return {"t": truth["t"] + latency, "cylinder": cyl, "verdict": verdict.astype("<U10")}


def _score(ride, det, show=None):
    return score.score_ride("steady", det, ride.events, show or {}, rig=ride.rig,
                            true_engine=ride.engine, retard={})


def test_a_perfect_detector_scores_100_and_0_even_one_revolution_off(alder_ride):
    tr = alder_ride.events
    flip = score.revolution_map(Alder.engine)
    assert flip.tolist() == [0, 4, 3, 2, 1]  # flat four 1-3-4-2: 1<->4, 2<->3 (firing order)
    got = _score(alder_ride, _as_detector(tr, flip=flip))
    b = got["bands"]["all"]
    n_mis = int((~tr["fired"]).sum())
    assert n_mis >= 5 and got["phase_flip"]
    assert (b["true_mis"], b["detected"], b["false_alarms"]) == (n_mis, n_mis, 0)
    assert b["partial_true"] == b["partial_as_partial"] > 0


def test_known_misses_and_false_alarms_are_counted_exactly(alder_ride):
    tr = alder_ride.events
    mis = np.flatnonzero(~tr["fired"])
    healthy = np.flatnonzero(tr["fired"] & (tr["burn_fraction"] == 1.0))
    det = _as_detector(tr, miss=mis[:3], false=healthy[100:105], partial_ok=False)
    b = _score(alder_ride, det)["bands"]["all"]
    assert b["detected"] == len(mis) - 3
    assert b["false_alarms"] == 5
    # Partial burns called misfire: counted apart, never false alarms on healthy events.
    assert b["partial_as_misfire"] == b["partial_true"]
    assert b["true_fired"] == len(healthy)


def test_unusable_events_leave_detection_but_not_the_dead_cylinder_figure(alder_ride):
    tr = alder_ride.events
    det = _as_detector(tr)
    mis = np.flatnonzero(~tr["fired"])
    det["verdict"][mis[:4]] = "unusable"
    b = _score(alder_ride, det)["bands"]["all"]
    assert b["true_mis"] == len(mis) - 4 and b["detected"] == len(mis) - 4
    assert b["raw_true_mis"] == len(mis) and b["raw_detected"] == len(mis) - 4
    assert b["unusable"] == 4


def test_intervals_are_judged_against_the_true_engine_and_its_retard():
    ride = simulate(Larch, Scenario(segments=(Segment(1.0, rpm=(3000, 3000), throttle=(5, 5)),),
                                    seed=2))
    show = {"intervals": [
        {"from_cyl": 1, "to_cyl": 2, "observed_deg": 281.0, "flagged": 1},
        {"from_cyl": 2, "to_cyl": 1, "observed_deg": 439.5, "flagged": 1}]}
    got = score.score_ride("retard", _as_detector(ride.events), ride.events, show, rig=Larch,
                           true_engine=ride.engine, retard={2: 10.0})
    # 270 + 10 = 280 and 450 - 10 = 440 (cylinder 2 fires 10 deg later).
    assert got["interval_err_deg"] == pytest.approx(1.0)
    assert got["retard_flagged"]


def test_one_short_cell_runs_through_the_cli_and_sees_every_injected_misfire(tmp_path):
    task = dict(kind="steady", rig="larch", seed=0, quick=True, out=str(tmp_path),
                label="test", pythonpath=None)
    r = run_ride(task)
    sc = build_scenario("steady", "larch", Larch, 0, quick=True)
    truth = simulate(Larch, sc).events
    b = r["bands"]["all"]
    # Every true event is matched by one the CLI exported (edges of the ride aside).
    assert b["matched"] >= len(truth) - 4
    assert b["raw_true_mis"] >= int((~truth["fired"]).sum()) - 1
    assert 0.8 <= r["effective_inertia_x"] <= 2.6 and r["wheel_rms_deg"] <= 0.15
    assert not r["cached"] and run_ride(task)["cached"]
    rows = build([r], [])
    text = render(rows)
    assert "steady larch" in text and rows[0].result in ("PASS", "MISS")


def test_every_cell_draws_physics_within_the_issue_ranges():
    for kind in KINDS:
        for seed in range(3):
            sc = build_scenario(kind, "alder", Alder, seed)
            p = sc.physics
            ref = p.geared_inertia_kgm2 / p.geared_ratio**2 / Alder.engine.inertia_kgm2
            assert 0.8 <= p.inertia_scale + ref <= 2.5 and ref > 0
            assert 5 <= p.driveline_hz <= 25 and p.combustion_cov <= 0.10
            assert sc.wheel.error_rms_deg <= 0.15
            assert sc.engine.fuel_cut == (kind == "fuelcut")
