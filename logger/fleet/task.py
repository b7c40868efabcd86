"""What a worker runs: one ride in, a :class:`RideResult` out (picklable both ways)."""

from __future__ import annotations

import time
from dataclasses import dataclass

from crankbeat.errors import CrankbeatError
from crankbeat.logger.fleet.rides import Ride
from crankbeat.logger.run.output import Priors, RunOutput


@dataclass
class RideResult:
    """The output of one ride, or why it failed (one line); CPU seconds spent on it."""

    index: int
    output: RunOutput | None
    error: str | None
    cpu_s: float


def analyse_ride(index: int, ride: Ride, priors: Priors) -> RideResult:
    """Analyse one ride with the given priors. Project errors become a one-line failure; a bug
    elsewhere is reported the same way (with its type) so the batch goes on."""
    from crankbeat.logger.run.drive import analyse_files

    t0 = time.process_time()
    try:
        out = analyse_files(ride.rig, ride.can, ride.accel, priors=priors,
                            sources=ride.sources or None)
    except CrankbeatError as exc:
        return RideResult(index, None, str(exc).splitlines()[0], time.process_time() - t0)
    except Exception as exc:  # noqa: BLE001 - a failing ride must not end the batch
        return RideResult(index, None, f"internal error: {type(exc).__name__}: {exc}",
                          time.process_time() - t0)
    return RideResult(index, out, None, time.process_time() - t0)
