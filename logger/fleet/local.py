"""The local backend: a pool of worker processes on this machine (the default)."""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait

from crankbeat.logger.fleet.engine import BatchEngine
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.fleet.task import RideResult, analyse_ride
from crankbeat.logger.run.output import Priors


class LocalPool(BatchEngine):
    """``workers`` processes (default: the cores this process may use).

    Rides are handed out a few at a time (twice the workers in flight), so a batch of thousands
    of rides does not queue them all (nor their results) at once.
    """

    def __init__(self, workers: int | None = None) -> None:
        self.workers = workers or len(os.sched_getaffinity(0))
        self.description = f"{self.workers} local process{'es' if self.workers > 1 else ''}"
        # spawn: no copy of the parent's open store or threads in the workers
        self.pool = ProcessPoolExecutor(self.workers,
                                        mp_context=multiprocessing.get_context("spawn"))

    def submit_all(self, rides: list[tuple[int, Ride, Priors]]) -> Iterator[RideResult]:
        todo = list(reversed(rides))
        running: set[Future] = set()
        while todo or running:
            while todo and len(running) < 2 * self.workers:
                running.add(self.pool.submit(analyse_ride, *todo.pop()))
            done, running = wait(running, return_when=FIRST_COMPLETED)
            for fut in done:
                yield fut.result()

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)
