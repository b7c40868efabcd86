"""The fleet group of ``make bench``: one batch of 20 rides on 1 and 2 local workers, and on a
Dask LocalCluster of 2 worker processes.

The 20 rides are copies of the cached 1-minute lap ride under 20 names (links, no disk cost):
equal work per ride, so the ratio shows the batch's scaling and not the luck of how unequal
rides fall on the workers. Each batch runs in a fresh process (``scripts/bench_fleet.py``) with
its workers started and warm before the clock starts; the figure is wall time (parallel speed
cannot be judged on CPU time), so the load of the machine at the time is printed with it.
"""

from __future__ import annotations

import os
from pathlib import Path

from bench.procs import run_child, script
from bench.table import Row
from crankbeat.errors import CrankbeatError

#: Target of issue 13: 2 workers analyse a batch at least this much faster than 1.
FLEET_SPEEDUP_MIN = 1.8
FLEET_RIDES = 20


def _ride_copies(b, n: int) -> Path:
    ride = b.ride("lap-1")
    folder = b.out / "fleet-rides"
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        stem = f"ride-{i:02d}"
        pairs = [(ride.can, folder / f"{stem}{ride.can.suffix}")]
        pairs += [(p, folder / f"{stem}.{name}.acraw") for name, p in ride.captures.items()]
        for src, dst in pairs:
            if not dst.exists():
                try:
                    os.link(src, dst)
                except OSError:
                    dst.symlink_to(Path(src).resolve())
    return folder


def _batch(b, folder: Path, *flags: str) -> dict:
    store = b.out / "fleet.db"
    run = run_child([script("bench_fleet.py"), "--rides", str(folder), "--store", str(store),
                     "--rig", b.rig, *flags])
    if not run.ok:
        raise CrankbeatError(f"fleet batch {' '.join(flags)} failed: {run.error}")
    for suffix in ("", "-wal", "-shm"):
        Path(str(store) + suffix).unlink(missing_ok=True)
    return run.result


def fleet_rows(b) -> list[Row]:
    from bench.measure import _guard, part_missing

    figs = [(f"fleet: {FLEET_RIDES} 1-min rides, 2 local workers: speed-up over 1", ">=",
             FLEET_SPEEDUP_MIN, "x")]
    return _guard(lambda: _fleet_rows(b), figs, part_missing("sim", "pipeline", "store"))


def _fleet_rows(b) -> list[Row]:
    folder = _ride_copies(b, FLEET_RIDES)
    res = {}
    for key, flags in (("1", ("--workers", "1")), ("2", ("--workers", "2")),
                       ("dask2", ("--dask", "2"))):
        b.say(f"fleet: {FLEET_RIDES} rides, {key} worker(s), load {os.getloadavg()[0]:.1f}")
        res[key] = r = _batch(b, folder, *flags)
        b.say(f"  {r['seconds']:.2f} s wall, workers' CPU {r['worker_cpu_s']:.2f} s, "
              f"start-up {r['startup_s']:.1f} s (untimed)")
    b.raw["fleet"] = res
    one, two, dask = (res[k]["seconds"] for k in ("1", "2", "dask2"))
    per_ride = res["1"]["worker_cpu_s"] / FLEET_RIDES
    beside = res["2"]["worker_cpu_s"] / FLEET_RIDES
    writer = res["2"]["writer_cpu_s"] / FLEET_RIDES
    # the writer shares the cores with the workers: 2 workers on 2 cores can at best do
    # 2 x analysis / (analysis + writing) better than one (the writer has a core of its own
    # then); and a worker beside another spends more CPU per ride than alone (shared cache)
    bound = 2 * per_ride / (per_ride + writer)
    return [
        Row(f"fleet: {FLEET_RIDES} 1-min rides, 1 local worker",
            f"{one:.2f} s wall ({per_ride:.2f} s CPU per ride)", value=one),
        Row(f"fleet: {FLEET_RIDES} 1-min rides, 2 local workers: speed-up over 1",
            f"{one:.2f} s / {two:.2f} s wall = {one / two:.2f}x (workers {beside:.2f} s CPU "
            f"per ride beside each other; writer {writer:.3f} s CPU per ride: bound on 2 cores "
            f"{bound:.2f}x; load {os.getloadavg()[0]:.1f})",
            value=one / two, op=">=", limit=FLEET_SPEEDUP_MIN, unit="x"),
        Row(f"fleet: {FLEET_RIDES} 1-min rides, Dask LocalCluster (2 worker processes): "
            "speed-up over 1 local worker",
            f"{one:.2f} s / {dask:.2f} s wall = {one / dask:.2f}x "
            f"(cluster start-up {res['dask2']['startup_s']:.1f} s, untimed)", value=one / dask),
    ]
