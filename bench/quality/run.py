"""One matrix ride: simulate (cached), analyse through the CLI, score against the truth.

The analysis is exactly a user's: ``crankbeat replay`` of the written CAN log and accelerometer
captures into a fresh store, then ``crankbeat events --format csv`` and ``crankbeat show --json``
(each a child process, so that another source tree can be measured with ``PYTHONPATH``). Nothing
is read from the analyser's internals. Scoring uses :func:`dsp.scoring.score_misfire`.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from bench.quality import score
from bench.quality.rides import build_scenario

#: Bump when the simulator changes what a scenario produces (invalidates the ride cache).
SIM_VERSION = "3"  # 3: tooth periods from a capture timer (telescoping quantisation)
_CLI = "import sys; from crankbeat.logger.cli.main import main; sys.exit(main(sys.argv[1:]))"


def ride_key(scenario) -> str:
    from crankbeat.logger.sim import scenario_to_toml

    text = SIM_VERSION + "\n" + scenario_to_toml(scenario)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _simulate_cached(rig, scenario, ride_dir: Path) -> tuple[dict, bool]:
    """Write the ride under ``ride_dir`` unless a complete copy is there; (paths, was_cached)."""
    from crankbeat.logger.sim import simulate, write_ride

    meta = ride_dir / "paths.json"
    if meta.exists():
        return json.loads(meta.read_text()), True
    # A folder of this process's own: two runs (a before and an after) may meet on one ride.
    tmp = ride_dir.with_name(f"{ride_dir.name}.tmp{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    ride = simulate(rig, scenario)
    p = write_ride(ride, tmp, stem="ride")
    paths = {"can": p.can.name, "truth": p.truth.name,
             "captures": {k: v.name for k, v in p.captures.items()},
             "effective_inertia_kgm2": ride.effective_inertia_kgm2}
    (tmp / "paths.json").write_text(json.dumps(paths))
    try:
        tmp.rename(ride_dir)
    except OSError:  # another run finished the same ride first: the same bytes, keep theirs
        shutil.rmtree(tmp, ignore_errors=True)
    return paths, False


def _cli(args: list[str], env: dict | None, where: str, cwd: Path) -> str:
    # Run in the ride's work folder: ``python -c`` puts the current folder first on sys.path,
    # and a source tree there would shadow the analyser asked for.
    r = subprocess.run([sys.executable, "-c", _CLI, *args], capture_output=True, text=True,
                       env=env, cwd=cwd)
    if r.returncode != 0:
        last = (r.stderr.strip().splitlines() or ["(no message)"])[-1]
        raise RuntimeError(f"{where}: crankbeat {args[0]} exit {r.returncode}: {last}")
    return r.stdout


def _read_events(path: Path) -> dict[str, np.ndarray]:
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    t = np.array([float(r["t"]) if r["t"] else np.nan for r in rows])
    return {"t": t, "cylinder": np.array([int(r["cylinder"]) for r in rows]),
            "verdict": np.array([r["verdict"].strip() for r in rows])}


def run_ride(task: dict) -> dict:
    """Simulate (or reuse) one ride, analyse it through the CLI and score it.

    ``task``: kind, rig, seed, quick, out (root folder), label (analyser label), pythonpath
    (None: the installed crankbeat). Returns a JSON-able result (see :mod:`bench.quality.score`).
    """
    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.sim import read_truth
    from crankbeat.logger.sim.ride import simulated_engine

    t0 = time.perf_counter()
    rig = load_rig(task["rig"])
    sc = build_scenario(task["kind"], task["rig"], rig, task["seed"], quick=task["quick"])
    key = ride_key(sc)
    out = Path(task["out"]).resolve()
    ride_dir = out / "rides" / key
    paths, cached = _simulate_cached(rig, sc, ride_dir)
    t_sim = time.perf_counter() - t0
    work = out / "runs" / task["label"] / key
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    env = None
    if task.get("pythonpath"):
        env = dict(os.environ, PYTHONPATH=task["pythonpath"])
    db = str(work / "store.db")
    where = f"{task['kind']}/{task['rig']}#{task['seed']}"
    args = ["replay", "--rig", task["rig"], "--can", str(ride_dir / paths["can"]),
            "--store", db, "--json"]
    for name, cap in paths["captures"].items():
        args += ["--accel", f"{name}={ride_dir / cap}"]
    _cli(args, env, where, work)
    ev_csv = work / "events.csv"
    _cli(["events", "last", "--store", db, "--format", "csv", "--out", str(ev_csv)], env,
         where, work)
    show = json.loads(_cli(["show", "last", "--store", db, "--json"], env, where, work))
    truth = read_truth(ride_dir / paths["truth"])
    engine = simulated_engine(rig, sc)
    result = score.score_ride(
        task["kind"], _read_events(ev_csv), truth, show, rig=rig, true_engine=engine,
        retard={f.cylinder: f.degrees for f in sc.faults if f.kind == "retard"},
    )
    result.update(kind=task["kind"], rig=task["rig"], seed=task["seed"], key=key,
                  cached=cached, sim_s=round(t_sim, 1),
                  total_s=round(time.perf_counter() - t0, 1),
                  effective_inertia_x=paths["effective_inertia_kgm2"]
                  / rig.engine.inertia_kgm2,
                  wheel_rms_deg=sc.wheel.error_rms_deg, driveline_hz=sc.physics.driveline_hz,
                  cov=sc.physics.combustion_cov)
    return result
