"""Bench helper: simulate one ride and write it into a folder (run by bench/rides.py).

Usage: python scripts/bench_ride.py --rig larch --scenario FILE.toml --out FOLDER

Runs in its own process because the simulator holds the whole ride in memory; the folder gets
the ride's files and ``bench-ride.json`` naming them (written last: the ride is complete), and
the same JSON is printed as the last line.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from bench.procs import own_peak_mb  # noqa: E402
from crankbeat.errors import CrankbeatError  # noqa: E402
from crankbeat.logger.rig import load_rig  # noqa: E402
from crankbeat.logger.sim import load_scenario, simulate, write_ride  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig", default="larch")
    ap.add_argument("--scenario", required=True, type=Path)
    ap.add_argument("--out", required=True, type=Path)
    args = ap.parse_args(argv)
    try:
        rig = load_rig(args.rig)
        scenario = load_scenario(args.scenario)
        ride = simulate(rig, scenario)
        paths = write_ride(ride, args.out, stem="ride")
    except CrankbeatError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    doc = {
        "can": paths.can.name,
        "captures": {k: p.name for k, p in paths.captures.items()},
        "duration_s": scenario.duration,
        "scenario": scenario.name,
        "seed": scenario.seed,
    }
    (args.out / "bench-ride.json").write_text(json.dumps(doc, indent=1), encoding="utf-8")
    print(json.dumps({**doc, "vm_hwm_mb": own_peak_mb()}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
