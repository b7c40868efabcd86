"""The rides of the quality matrix: one builder per ride kind, physics drawn per seed.

Every ride's physics is drawn from the ranges the analyser must cope with, never from the rig
file: effective inertia 0.8-2.5x the rig's crank (crank part 0.7-1.1x plus a geared part of
0.1-1.4x through a compliance), tooth spacing errors 0-0.15 deg rms, driveline mode 5-25 Hz,
combustion scatter 2-10 % COV, cylinder spread up to 4 %, CAN latency and jitter. Only the
``fuelcut`` kind has an overrun fuel cut; every other ride has none.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from crankbeat.logger.rig.model import Rig
from crankbeat.logger.sim import CanSpec, EngineSpec, Fault, Physics, Scenario, Segment, WheelSpec

RIGS = ("larch", "alder")
#: The rig file says one layout; the engine of a ``layout`` ride really has another.
WRONG_LAYOUT = {"twin-270": "twin-360", "four-flat": "four-cross"}
START = 1767225600.0


@dataclass(frozen=True)
class RideKind:
    name: str
    title: str
    build: Callable[[Rig, np.random.Generator, int], tuple[tuple[Segment, ...], tuple[Fault, ...]]]
    seconds: float


def _rng_for(kind: str, rig: str, seed: int) -> np.random.Generator:
    key = hashlib.sha256(f"{kind}/{rig}/{seed}".encode()).digest()[:8]
    return np.random.default_rng(int.from_bytes(key, "little"))


def draw_physics(rig: Rig, rng: np.random.Generator) -> tuple[Physics, WheelSpec, CanSpec]:
    """Physics the analyser is not told (see the module docstring for the ranges)."""
    geared_share = rng.uniform(0.1, 1.4)  # of the rig's crank inertia, referred to the crank
    ratio = rng.uniform(1.6, 2.6)
    phys = Physics(
        inertia_scale=rng.uniform(0.7, 1.1),
        geared_inertia_kgm2=geared_share * rig.engine.inertia_kgm2 * ratio**2,
        geared_ratio=ratio,
        geared_hz=rng.uniform(120.0, 350.0),
        driveline_hz=rng.uniform(5.0, 25.0),
        combustion_cov=rng.uniform(0.02, 0.10),
        cylinder_spread=rng.uniform(0.0, 0.04),
    )
    wheel = WheelSpec(error_rms_deg=rng.uniform(0.0, 0.15))
    can = CanSpec(latency_s=rng.uniform(0.0002, 0.001), jitter_s=rng.uniform(0.00005, 0.0005))
    return phys, wheel, can


def _random_misfires(n_cyl: int, start: float, end: float, p: float) -> tuple[Fault, ...]:
    return tuple(Fault("misfire", c, start=start, end=end, probability=p)
                 for c in range(1, n_cyl + 1))


def _steady(rig, rng, n_cyl):
    rpm = rng.uniform(3500, 6500)
    thr = rng.uniform(15, 35)
    segs = (Segment(3.0, gear=4, rpm=(rpm, rpm), throttle=(thr, thr), label="settle"),
            Segment(22.0, gear=4, rpm=(rpm, rpm * rng.uniform(0.95, 1.05)),
                    throttle=(thr, thr + rng.uniform(-5, 5)), label="steady"))
    return segs, _random_misfires(n_cyl, 2.0, 25.0, 0.015)


def _sweep(rig, rng, n_cyl):
    segs = (Segment(3.0, gear=3, rpm=(2000, 2000), throttle=(20, 20), label="settle"),
            Segment(18.0, gear=3, rpm=(2000, 9500), throttle=(30, rng.uniform(60, 90)),
                    label="pull"),
            Segment(16.0, gear=3, rpm=(9500, 3000), throttle=(12, 5), label="back, no cut"),
            Segment(12.0, gear=4, rpm=(3000, 7000), throttle=(15, 45), label="second pull"),
            Segment(11.0, gear=5, rpm=(7000, 4000), throttle=(25, 10), label="ease off"))
    return segs, _random_misfires(n_cyl, 2.0, 60.0, 0.01)


def _highlight(rig, rng, n_cyl):
    segs = (Segment(3.0, gear=2, rpm=(8000, 8000), throttle=(10, 10), label="settle"),
            Segment(10.0, gear=2, rpm=(8000, 10500), throttle=(8, 11.5), label="up"),
            Segment(12.0, gear=2, rpm=(10500, 8000), throttle=(11.5, 6), label="down"))
    return segs, _random_misfires(n_cyl, 2.0, 25.0, 0.015)


def _rough(rig, rng, n_cyl):
    segs = (Segment(3.0, gear=3, rpm=(3500, 3500), throttle=(20, 20), label="settle"),
            Segment(22.0, gear=3, rpm=(3500, 5000), throttle=(20, 30),
                    rough=rng.uniform(1.5, 3.0), label="rough road"))
    return segs, ()


def _layout(rig, rng, n_cyl):
    rpm = rng.uniform(3000, 6000)
    segs = (Segment(20.0, gear=4, rpm=(rpm, rpm * 1.2), throttle=(20, 30), label="wrong rig"),)
    return segs, ()


def _dead(rig, rng, n_cyl):
    cyl = int(rng.integers(1, n_cyl + 1))
    start = 0.0 if rng.random() < 0.4 else rng.uniform(6.0, 10.0)
    rpm = rng.uniform(3000, 6000)
    segs = (Segment(25.0, gear=4, rpm=(rpm, rpm * 1.1), throttle=(25, 35), label="dead cyl"),)
    return segs, (Fault("misfire", cyl, start=start, end=start + 10.0),)


def _retard(rig, rng, n_cyl):
    cyl = int(rng.integers(1, n_cyl + 1))
    part = 1 + (cyl % n_cyl)
    segs = (Segment(15.0, gear=3, rpm=(3000, 7000), throttle=(25, 50), label="pull"),
            Segment(15.0, gear=4, rpm=(5000, 5000), throttle=(20, 20), label="cruise"),
            Segment(15.0, gear=4, rpm=(5000, 3500), throttle=(10, 10), label="light"),
            Segment(15.0, gear=2, rpm=(4000, 8500), throttle=(40, 70), label="pull"))
    faults = (Fault("retard", cyl, degrees=10.0),
              Fault("partial_burn", part, start=5.0, end=55.0, probability=0.03,
                    fraction=rng.uniform(0.3, 0.6)),
              *_random_misfires(n_cyl, 2.0, 60.0, 0.008))
    return segs, faults


def _fuelcut(rig, rng, n_cyl):
    cyl = int(rng.integers(1, n_cyl + 1))
    segs = (Segment(6.0, gear=4, rpm=(5000, 5000), throttle=(25, 25), label="cruise"),
            Segment(5.0, gear=4, rpm=(5000, 2600), throttle=(0, 0), label="overrun cut"),
            Segment(14.0, gear=3, rpm=(3000, 4500), throttle=(25, 30), label="bursts"))
    faults = tuple(Fault("misfire", cyl, start=t, end=t + 1.5, probability=0.4)
                   for t in (12.0, 16.0, 20.0))
    return segs, faults


KINDS = {k.name: k for k in (
    RideKind("steady", "steady mid-range", _steady, 25.0),
    RideKind("sweep", "sweep 2000-9500 rpm (60 s)", _sweep, 60.0),
    RideKind("highlight", "8000-10500 rpm <12 % thr", _highlight, 25.0),
    RideKind("rough", "rough road, no misfire", _rough, 25.0),
    RideKind("layout", "wrong layout in the rig", _layout, 20.0),
    RideKind("dead", "dead cylinder 10 s", _dead, 25.0),
    RideKind("retard", "retard 10 + partial (60 s)", _retard, 60.0),
    RideKind("fuelcut", "fuel cut, misfire bursts", _fuelcut, 25.0),
)}


def build_scenario(kind: str, rig_name: str, rig: Rig, seed: int, *, quick: bool = False
                   ) -> Scenario:
    """The scenario of one matrix ride; the same arguments give the same ride."""
    rng = _rng_for(kind, rig_name, seed)
    phys, wheel, can = draw_physics(rig, rng)
    segs, faults = KINDS[kind].build(rig, rng, rig.engine.n_cylinders)
    if quick:  # a dry run: every stretch a third as long (faults keep their times)
        segs = tuple(Segment(max(s.duration / 3.0, 1.0), gear=s.gear, rpm=s.rpm,
                             road_kmh=s.road_kmh, throttle=s.throttle, rough=s.rough,
                             label=s.label) for s in segs)
    engine = EngineSpec(fuel_cut=(kind == "fuelcut"),
                        true_layout=WRONG_LAYOUT[rig.engine.name] if kind == "layout" else None)
    return Scenario(segments=segs, faults=faults, seed=int(rng.integers(1 << 31)),
                    name=f"quality {kind} {rig_name} #{seed}", start_time=START, rig=rig_name,
                    engine=engine, physics=phys, wheel=wheel, can=can)
