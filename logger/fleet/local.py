"""The local backend: a pool of worker processes on this machine (the default)."""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool

from crankbeat.logger.fleet.engine import BatchEngine
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.fleet.task import RideResult, analyse_ride
from crankbeat.logger.run.output import Priors

Job = tuple[int, Ride, Priors]


class LocalPool(BatchEngine):
    """``workers`` processes (default: the cores this process may use).

    Rides are handed out a few at a time (twice the workers in flight), so a batch of thousands
    of rides does not queue them all (nor their results) at once.

    A worker process that dies (killed for memory, a crash in a library) breaks the whole pool
    and every ride in flight with it. The pool is then started again and the rides that were in
    flight are analysed once more, one at a time, so that the one that kills its worker again
    is reported as failed and the others are not. ``task`` is what a worker runs per ride (a
    module-level function, as the pool pickles it by name).
    """

    def __init__(self, workers: int | None = None, *,
                 task: Callable[[int, Ride, Priors], RideResult] = analyse_ride) -> None:
        self.workers = workers or len(os.sched_getaffinity(0))
        self.description = f"{self.workers} local process{'es' if self.workers > 1 else ''}"
        self.task = task
        self.pool = self._start()

    def _start(self) -> ProcessPoolExecutor:
        # spawn: no copy of the parent's open store or threads in the workers
        return ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("spawn"))

    def submit_all(self, rides: list[Job]) -> Iterator[RideResult]:
        todo = list(reversed(rides))
        suspects: list[Job] = []  # in flight when a worker died: run again one at a time
        running: dict[Future, Job] = {}
        while todo or suspects or running:
            solo = bool(suspects)
            if solo and not running:
                job = suspects.pop()
                running[self.pool.submit(self.task, *job)] = job
            while not solo and todo and len(running) < 2 * self.workers:
                job = todo.pop()
                running[self.pool.submit(self.task, *job)] = job
            done, _ = wait(running, return_when=FIRST_COMPLETED)
            if not any(isinstance(f.exception(), BrokenProcessPool) for f in done):
                for fut in done:
                    running.pop(fut)
                    yield fut.result()
                continue
            finished = [f for f in running if f.done() and f.exception() is None]
            for fut in finished:
                yield fut.result()
            victims = [job for f, job in running.items() if f not in finished]
            running.clear()
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = self._start()
            if solo:  # it was alone on the pool: this ride kills its worker
                ((index, _ride, _priors),) = victims
                yield RideResult(index, None, "the worker process analysing it died "
                                 "(killed, out of memory, or a crash in a library); the batch "
                                 "went on", 0.0)
            else:
                suspects.extend(reversed(victims))

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)
