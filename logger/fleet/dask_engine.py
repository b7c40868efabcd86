"""The cluster backend: Dask distributed (the ``fleet`` extra).

The scheduler is given by address (``tcp://HOST:PORT``); every worker must have crankbeat (the
same version) installed and see the rides' files under the same paths (a shared file system or
object store mounted alike). Results come back to this process, which alone writes the store.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Iterator

from crankbeat.errors import SourceError, UsageError
from crankbeat.logger.fleet.engine import BatchEngine
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.fleet.task import RideResult, analyse_ride
from crankbeat.logger.run.output import Priors


class DaskEngine(BatchEngine):
    """Rides as tasks on a Dask cluster (``client`` given, or the scheduler's address)."""

    def __init__(self, address: str | None = None, *, client=None) -> None:
        if importlib.util.find_spec("distributed") is None:
            raise UsageError("--scheduler needs Dask distributed: pip install 'crankbeat[fleet]'")
        from distributed import Client

        self._own = client is None
        if client is None:
            try:
                client = Client(address, timeout="10s")
            except (OSError, TimeoutError) as exc:
                raise SourceError(f"no Dask scheduler at '{address}': {exc}") from None
        self.client = client
        n = len(client.scheduler_info().get("workers", {}))
        self.description = f"Dask cluster {client.scheduler.address} ({n} workers)"

    def submit_all(self, rides: list[tuple[int, Ride, Priors]]) -> Iterator[RideResult]:
        from distributed import as_completed

        # pure=False: a ride is analysed each time it is asked for, never served from a cache
        futures = [self.client.submit(analyse_ride, i, ride, priors, pure=False)
                   for i, ride, priors in rides]
        for fut in as_completed(futures):
            yield fut.result()
            fut.release()

    def close(self) -> None:
        if self._own:
            self.client.close()
