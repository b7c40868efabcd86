"""Bench helper: one whole replay into a fresh store, timed inside a fresh process.

Usage: python scripts/bench_replay.py --can LOG [--accel NAME=CAPTURE ...] --store FILE
       [--rig larch] [--cpu N] [--profile OUT.pstats]

The timed span is everything ``crankbeat replay`` does with the files: open (create) the store,
hash the sources, stream, analyse, write and close. Imports and the interpreter start are
outside it (bench.py sees them in the process's wall time). ``--cpu`` pins the process to one
core, so the figure is for one core whatever else runs. Prints one JSON line: wall and CPU
seconds of the span, events stored, and the process's own peak memory (VmHWM).
"""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import crankbeat.logger.cli  # noqa: E402, F401 - the command's process settings (one BLAS thread)
from bench.procs import own_peak_mb  # noqa: E402


def _fresh(path: Path) -> None:
    for suffix in ("", "-wal", "-shm"):
        p = Path(str(path) + suffix)
        if p.exists():
            p.unlink()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig", default="larch")
    ap.add_argument("--can", required=True, type=Path)
    ap.add_argument("--accel", action="append", default=[], metavar="NAME=CAPTURE")
    ap.add_argument("--store", required=True, type=Path)
    ap.add_argument("--cpu", type=int)
    ap.add_argument("--profile", type=Path)
    args = ap.parse_args(argv)
    if args.cpu is not None:
        os.sched_setaffinity(0, {args.cpu})

    from crankbeat.errors import CrankbeatError
    from crankbeat.logger.pipeline import analyse_replay
    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.store import Store

    accel = dict(spec.split("=", 1) for spec in args.accel)
    try:
        rig = load_rig(args.rig)
        _fresh(args.store)

        def whole() -> int:
            with Store.open(args.store, create=True) as store:
                return analyse_replay(rig, args.can, accel, store, force=True).run_id

        if args.profile is not None:
            import cProfile

            prof = cProfile.Profile()
            c0, t0 = time.process_time(), time.perf_counter()
            run_id = prof.runcall(whole)
            seconds, cpu_s = time.perf_counter() - t0, time.process_time() - c0
            prof.dump_stats(str(args.profile))
        else:
            c0, t0 = time.process_time(), time.perf_counter()
            run_id = whole()
            seconds, cpu_s = time.perf_counter() - t0, time.process_time() - c0
    except CrankbeatError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    with sqlite3.connect(args.store) as db:
        events = db.execute("SELECT COUNT(*) FROM events WHERE run = ?", (run_id,)).fetchone()[0]
        status = db.execute("SELECT status FROM runs WHERE id = ?", (run_id,)).fetchone()[0]
    db.close()
    print(json.dumps({"seconds": seconds, "cpu_s": cpu_s, "run_id": run_id, "events": events,
                      "status": status, "vm_hwm_mb": own_peak_mb()}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
