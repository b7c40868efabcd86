"""The cluster backend: Dask distributed (the ``fleet`` extra).

The scheduler is given by address (``tcp://HOST:PORT``); every worker must have crankbeat (the
same version) installed and see the rides' files under the same paths (a shared file system or
object store mounted alike). Results come back to this process, which alone writes the store.
"""

from __future__ import annotations

import importlib.util
import socket
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
            _probe(address)
            try:
                client = Client(address, timeout="10s")
            except (OSError, TimeoutError) as exc:
                raise SourceError(f"no Dask scheduler at '{address}': {exc}") from None
        self.client = client
        n = len(client.scheduler_info().get("workers", {}))
        self.description = f"Dask cluster {client.scheduler.address} ({n} workers)"

    def submit_all(self, rides: list[tuple[int, Ride, Priors]]) -> Iterator[RideResult]:
        """Rides go to the cluster a window at a time (twice its workers, at least 4), so that
        a batch of thousands keeps neither its tasks nor its results all at once. A ride whose
        task fails on the cluster (its worker lost more often than Dask retries) is reported
        as failed; the batch goes on."""
        from distributed import as_completed

        window = max(4, 2 * len(self.client.scheduler_info().get("workers", {})))
        todo = list(reversed(rides))
        index: dict = {}

        def submit():
            i, ride, priors = todo.pop()
            # pure=False: a ride is analysed each time it is asked for, never from a cache
            fut = self.client.submit(analyse_ride, i, ride, priors, pure=False)
            index[fut.key] = i
            return fut

        pending = as_completed([submit() for _ in range(min(window, len(todo)))])
        for fut in pending:
            try:
                yield fut.result()
            except Exception as exc:  # noqa: BLE001 - a lost ride must not end the batch
                yield RideResult(index[fut.key], None,
                                 f"lost on the cluster: {type(exc).__name__}: {exc}", 0.0)
            fut.release()
            if todo:
                pending.add(submit())

    def close(self) -> None:
        if self._own:
            self.client.close()


def _probe(address: str | None, timeout_s: float = 5.0) -> None:
    """Refuse an address where nothing listens before Dask is asked (a Client that fails to
    connect leaves its event-loop thread running in this process)."""
    from urllib.parse import urlsplit

    if not address:
        raise UsageError("--scheduler needs an address, tcp://HOST:PORT")
    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    if parts.scheme != "tcp" or not parts.hostname or not parts.port:
        return  # other transports (tls://, inproc://): Dask says what it thinks of them
    try:
        socket.create_connection((parts.hostname, parts.port), timeout=timeout_s).close()
    except OSError as exc:
        raise SourceError(f"no Dask scheduler at '{address}': {exc.strerror or exc}") from None
