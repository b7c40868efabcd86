"""The rides the benchmark replays, generated once by ``logger.sim`` and cached on disk.

A ride of N minutes is N laps of the same one-minute lap of the invented Larch test loop (idle,
a pull through two gears, cruise, overrun fuel cut, a rough stretch, a misfiring spell, idle),
so every ride has the same content per minute and the scaling figures compare like with like.
The live ride holds the reference rig at 10 500 rpm.

Cache: ``<root>/<name>-seed<seed>-<key>/`` where the key hashes the rig spec, the scenario file
text and the simulator's source, so a changed simulator regenerates its rides (and the older
copies of the same scenario are removed: an hour-long ride is a third of a GB). A ride is
written into a temporary folder by a child process (``scripts/bench_ride.py``; the simulator
holds the whole ride in memory, several GB for an hour) and renamed when complete, so an
interrupted generation never leaves a half ride in the cache.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from bench.procs import run_child, script
from crankbeat.errors import CrankbeatError, InputError
from crankbeat.logger.sim import Fault, Scenario, Segment, scenario_to_toml

ROOT = Path(__file__).resolve().parent.parent
START_TIME = 1767225600.0  # invented ride date on the CAN time base
LAP_S = 60.0
MANIFEST = "bench-ride.json"


def _lap() -> tuple[Segment, ...]:
    s = Segment
    return (
        s(7.0, gear=0, rpm=(1300, 1300), throttle=(1.5, 1.5), label="idle"),
        s(4.0, gear=1, rpm=(2200, 7800), throttle=(50, 90), label="pull 1st"),
        s(3.0, gear=2, rpm=(5400, 8600), throttle=(90, 90), label="pull 2nd"),
        s(14.0, gear=4, rpm=(4800, 5200), throttle=(20, 24), label="cruise"),
        s(6.0, gear=4, rpm=(5200, 2400), throttle=(0, 0), label="overrun"),
        s(9.0, gear=3, rpm=(3700, 3700), throttle=(18, 18), rough=1.3, label="rough stretch"),
        s(8.0, gear=3, rpm=(3500, 3900), throttle=(20, 24), label="misfiring spell"),
        s(3.0, gear=2, rpm=(3100, 2300), throttle=(8, 4), label="slowing"),
        s(6.0, gear=0, rpm=(1300, 1300), throttle=(1.5, 1.5), label="idle"),
    )


def lap_scenario(minutes: int, *, seed: int = 4242) -> Scenario:
    """``minutes`` laps of the one-minute bench lap, with a misfiring spell in every lap."""
    if minutes < 1:
        raise InputError(f"minutes must be >= 1, got {minutes!r}")
    lap = _lap()
    assert abs(sum(x.duration for x in lap) - LAP_S) < 1e-9
    spell = sum(x.duration for x in lap[:6])
    faults = []
    for k in range(minutes):
        t = k * LAP_S + spell
        faults.append(Fault("misfire", 2, start=t + 1.0, end=t + 4.0, probability=0.3))
        faults.append(Fault("misfire", 1, start=t + 5.0, end=t + 7.0, probability=0.05))
    return Scenario(segments=lap * minutes, faults=tuple(faults), seed=seed,
                    name=f"bench-lap-{minutes}min", start_time=START_TIME, rig="larch")


def live_scenario(seconds: float = 25.0, *, rpm: float = 10500.0, seed: int = 1050) -> Scenario:
    """The reference rig held at ``rpm`` in third gear for ``seconds``."""
    seg = Segment(float(seconds), gear=3, rpm=(rpm, rpm), throttle=(75, 75), label="held")
    return Scenario(segments=(seg,), seed=seed, name=f"bench-live-{rpm:.0f}rpm-{seconds:g}s",
                    start_time=START_TIME, rig="larch")


@dataclass
class RideFiles:
    """A generated ride on disk."""

    folder: Path
    can: Path
    captures: dict[str, Path]
    duration_s: float
    generated_s: float  # how long the generation took (0 when it came from the cache)
    generated_peak_mb: float = 0.0  # peak RSS of the generating process


def _sim_source_digest() -> str:
    h = hashlib.sha256()
    for p in sorted((ROOT / "logger" / "sim").glob("*.py")):
        h.update(p.name.encode())
        h.update(p.read_bytes())
    return h.hexdigest()


def ride_key(rig: str, scenario: Scenario) -> str:
    """Cache key of a ride: rig spec, scenario text and simulator source."""
    h = hashlib.sha256()
    for part in (rig, scenario_to_toml(scenario), _sim_source_digest()):
        h.update(part.encode("utf-8"))
        h.update(b"\0")
    return h.hexdigest()[:12]


def _load(folder: Path) -> RideFiles | None:
    man = folder / MANIFEST
    if not man.is_file():
        return None
    doc = json.loads(man.read_text(encoding="utf-8"))
    files = RideFiles(folder, folder / doc["can"],
                      {k: folder / v for k, v in doc["captures"].items()},
                      float(doc["duration_s"]), 0.0)
    if not files.can.is_file() or not all(p.is_file() for p in files.captures.values()):
        return None
    return files


def _prune(root: Path, scenario: Scenario, keep: Path) -> None:
    """Remove the copies of this scenario made by an older simulator: never read again."""
    for stale in root.glob(f"{scenario.name}-seed{scenario.seed}-*"):
        if stale != keep and stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)


def ensure_ride(scenario: Scenario, root: Path, *, rig: str = "larch",
                timeout_s: float = 1800.0) -> RideFiles:
    """The ride of ``scenario`` under ``root``, generated first when it is not cached.

    Raises
    ------
    CrankbeatError
        The generating child failed (its last stderr lines are in the message).
    """
    folder = root / f"{scenario.name}-seed{scenario.seed}-{ride_key(rig, scenario)}"
    cached = _load(folder)
    if cached is not None:
        _prune(root, scenario, folder)
        return cached
    root.mkdir(parents=True, exist_ok=True)
    tmp = root / f".tmp-{folder.name}-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    spec = tmp / "request.scenario.toml"
    spec.write_text(scenario_to_toml(scenario), encoding="utf-8")
    run = run_child([script("bench_ride.py"), "--rig", rig, "--scenario", str(spec),
                     "--out", str(tmp)], timeout_s=timeout_s)
    if not run.ok:
        shutil.rmtree(tmp, ignore_errors=True)
        raise CrankbeatError(f"generating ride {scenario.name!r} failed: {run.error}")
    if folder.exists():
        shutil.rmtree(folder)
    tmp.rename(folder)
    _prune(root, scenario, folder)
    files = _load(folder)
    if files is None:
        raise CrankbeatError(f"generating ride {scenario.name!r} left no manifest in {folder}")
    files.generated_s = run.wall_s
    files.generated_peak_mb = run.peak_rss_mb
    return files
