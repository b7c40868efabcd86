"""Where a batch's rides are analysed: the small interface every backend keeps.

A backend runs :func:`logger.fleet.task.analyse_ride` on many rides and yields the results as
they complete (any order). Backends: :mod:`~logger.fleet.local` (a process pool on this
machine) and :mod:`~logger.fleet.dask_engine` (a Dask distributed cluster).
"""

from __future__ import annotations

from collections.abc import Iterator

from crankbeat.errors import UsageError
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.fleet.task import RideResult
from crankbeat.logger.run.output import Priors


class BatchEngine:
    """Runs rides somewhere; a context manager (workers start on enter, stop on exit)."""

    #: shown in the progress line
    description = "engine"

    def submit_all(self, rides: list[tuple[int, Ride, Priors]]) -> Iterator[RideResult]:
        """Analyse every ride; yield results as they complete."""
        raise NotImplementedError

    def __enter__(self) -> BatchEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Stop the workers."""


def make_engine(*, workers: int | None = None, scheduler: str | None = None) -> BatchEngine:
    """A local pool of ``workers`` processes (default: every core), or the Dask cluster whose
    scheduler listens at ``scheduler`` ("tcp://HOST:PORT")."""
    if workers is not None and workers < 1:
        raise UsageError(f"--workers must be >= 1, got {workers}")
    if scheduler:
        from crankbeat.logger.fleet.dask_engine import DaskEngine

        return DaskEngine(scheduler)
    from crankbeat.logger.fleet.local import LocalPool

    return LocalPool(workers)
