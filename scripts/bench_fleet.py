"""Bench helper: one batch of rides (``logger.fleet``) into a fresh store, timed in a fresh process.

Usage: python scripts/bench_fleet.py --rides DIR --store FILE (--workers N | --dask N)
       [--rig larch]

The workers are started and have imported crankbeat before the clock starts (one warm-up task
each): the figure is the batch's own throughput, the start-up is printed beside it. The timed
span is :func:`logger.fleet.batch.run_batch`: hash, skip check, analysis on the workers, every
output stored by this one process. Prints one JSON line: wall seconds of the span, the workers'
CPU seconds on the rides, this process's CPU seconds (hashing, the skip check and the one
writer), rides stored and failed, start-up seconds.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))


def _warm(seconds: float = 0.3) -> str:
    """Runs on a worker: import what a ride needs, then hold the worker a moment so that every
    worker gets one warm-up task."""
    import crankbeat.logger.run.drive  # noqa: F401

    time.sleep(seconds)
    return "warm"


def _engine(args):
    if args.dask:
        import logging

        import distributed

        from crankbeat.logger.fleet.dask_engine import DaskEngine

        cluster = distributed.LocalCluster(n_workers=args.dask, threads_per_worker=1,
                                           processes=True, host="127.0.0.1",
                                           dashboard_address=None, silence_logs=logging.ERROR)
        client = distributed.Client(cluster)
        client.gather([client.submit(_warm, pure=False) for _ in range(args.dask)])
        engine = DaskEngine(client=client)
        return engine, lambda: (client.close(), cluster.close())
    from crankbeat.logger.fleet.local import LocalPool

    engine = LocalPool(args.workers)
    list(engine.pool.map(_warm, [0.3] * args.workers))
    return engine, engine.close


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig", default="larch")
    ap.add_argument("--rides", required=True, type=Path)
    ap.add_argument("--store", required=True, type=Path)
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--dask", type=int, default=0, metavar="N", help="a LocalCluster of N")
    args = ap.parse_args(argv)

    from crankbeat.logger.fleet.batch import run_batch
    from crankbeat.logger.fleet.rides import rides_from_paths
    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.store import Store

    for suffix in ("", "-wal", "-shm"):
        Path(str(args.store) + suffix).unlink(missing_ok=True)
    rides = rides_from_paths([str(args.rides)], load_rig(args.rig))
    t0 = time.perf_counter()
    engine, close = _engine(args)
    startup = time.perf_counter() - t0
    try:
        with Store.open(args.store, create=True) as store:
            t1, c1 = time.perf_counter(), time.process_time()
            report = run_batch(store, rides, engine)
            seconds, writer_cpu = time.perf_counter() - t1, time.process_time() - c1
    finally:
        close()
    print(json.dumps({"seconds": seconds, "startup_s": startup, "rides": len(rides),
                      "stored": len(report.stored), "failed": len(report.failed),
                      "worker_cpu_s": report.cpu_s,
                      "writer_cpu_s": writer_cpu, "errors": list(report.failed.values())[:3]}))
    return 0 if not report.failed else 1


if __name__ == "__main__":
    sys.exit(main())
