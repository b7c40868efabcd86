"""Synthetic runs for the store, CLI and report tests (no tests in this file).

Events of an Larch-like 270° twin (docs/rig: cylinder 2 fires 270° after cylinder 1, then 450° back
to cylinder 1), with misfires placed at known events so every count is known exactly.
"""

from __future__ import annotations

import numpy as np

from crankbeat.dsp.crank import ToothWheel
from crankbeat.dsp.engine import Engine
from crankbeat.dsp.events import FIRED, FUEL_CUT, MASKED, MISFIRE, PARTIAL, UNUSABLE, empty_events
from crankbeat.logger.rig.model import CanBus, Rig

# docs/rig.md: 270° crank twin -> intervals 270 (1->2) and 450 (2->1); common practice.
EXPECTED = {1: 450.0, 2: 270.0}  # interval ending at this cylinder's firing


def larch_like_rig() -> Rig:
    """A rig object carrying the Larch preset's file text (source "preset:larch")."""
    engine = Engine(name="twin-270", stroke_cycle=4, pin_deg=(0.0, 270.0), bank_deg=(0.0, 0.0),
                    position_m=(-0.04, 0.04), firing_order=(1, 2))
    return Rig(name="larch", description="test", source="preset:larch", engine=engine,
               wheel=ToothWheel(),
               can_bus=CanBus(), messages=(), sensors=())


def make_events(n_cycles: int = 2000, *, misfire_every: dict[int, int] | None = None,
                interval_offset: dict[int, float] | None = None, rpm=(3000.0, 7000.0),
                seed: int = 1, special: bool = True) -> np.ndarray:
    """Two events per cycle; cylinder c misfires on every ``misfire_every[c]``-th of its cycles.

    ``interval_offset[c]`` shifts the observed interval ending at cylinder c (degrees).
    With ``special``, cycles 5, 6, 7 and 8 of cylinder 1 are masked, unusable, fuel-cut and
    masked, so every verdict appears.
    """
    rng = np.random.default_rng(seed)
    misfire_every = misfire_every or {}
    interval_offset = interval_offset or {}
    n = 2 * n_cycles
    ev = empty_events(n)
    cyc = np.repeat(np.arange(n_cycles), 2)
    cyl = np.tile([1, 2], n_cycles)
    rpm_v = np.linspace(rpm[0], rpm[1], n)
    # 720 crank degrees per cycle at rpm: 120 / rpm seconds per cycle (4-stroke).
    dt = np.where(cyl == 2, 270.0, 450.0) / 720.0 * 120.0 / rpm_v
    ev["t"] = np.cumsum(dt)
    ev["cycle"], ev["cylinder"], ev["rpm"] = cyc, cyl, rpm_v
    ev["throttle"] = 30.0
    ev["metric"] = rng.normal(0.0, 0.1, n)
    ev["threshold"] = 1.0
    ev["verdict"] = FIRED
    ev["confidence"] = 0.9
    ev["expected_interval_deg"] = np.where(cyl == 2, 270.0, 450.0)
    off = np.array([interval_offset.get(int(c), 0.0) for c in cyl])
    ev["interval_deg"] = ev["expected_interval_deg"] + off + rng.normal(0.0, 0.2, n)
    ev["contribution"] = 1.0 + rng.normal(0.0, 0.01, n)
    for c, k in misfire_every.items():
        sel = (cyl == c) & (cyc % k == k - 1)
        ev["verdict"][sel] = MISFIRE
        ev["metric"][sel] = 3.0
    if special and n_cycles > 8:
        for cycle, verdict in ((5, MASKED), (6, UNUSABLE), (7, FUEL_CUT), (8, MASKED)):
            ev["verdict"][2 * cycle] = verdict
    ev["interval_deg"][0] = np.nan  # no previous firing for the first event
    return ev


def fill_run(store, ev, *, label=None, odometer_km=None, started_at=None, sources=(),
             vibration=None, status="complete") -> int:
    run_id = store.begin_run(larch_like_rig(), label=label, odometer_km=odometer_km,
                             started_at=started_at, sources=sources)
    store.add_events(run_id, ev)
    if vibration is not None:
        store.add_vibration(run_id, vibration)
    if status is not None:
        store.finish_run(run_id, {"note": "synthetic"}, status=status)
    store.commit()
    return run_id


def counts(ev: np.ndarray, cyl: int) -> tuple[int, int]:
    """(misfires, counted) of one cylinder, the slow obvious way (fired, partial burns and
    misfires are counted; common practice, see tests/test_rate_definition.py)."""
    mis = counted = 0
    for row in ev[ev["cylinder"] == cyl]:
        if row["verdict"] == MISFIRE:
            mis += 1
        if row["verdict"] in (FIRED, PARTIAL, MISFIRE):
            counted += 1
    return mis, counted
