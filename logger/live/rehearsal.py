"""A desk rehearsal of ``crankbeat ride``: a recorded (or simulated) ride played through the live
path at its own pace, with no bike and no hardware.

The CAN frames go onto python-can's virtual bus, each accelerometer capture is served on a local
TCP port that pyserial opens as ``socket://127.0.0.1:PORT``; the ride reads both exactly as it
reads a bike's bus and ports (watchdog, screen, alerts, recording, store). When the played ride
ends, the rehearsal ends as a rider's Ctrl-C would.
"""

from __future__ import annotations

import socket
import threading
import time
import uuid
from pathlib import Path

import can

from crankbeat.errors import UsageError
from crankbeat.logger.rig.model import CanBus, Rig

#: How long to wait for the ride to join the virtual bus before playing, s.
JOIN_WAIT_S = 60.0


def captures_beside(can_log: Path, rig: Rig) -> dict[str, Path]:
    """The captures recorded with ``can_log``: ``<stem>.<sensor>.acraw`` beside it."""
    stem = can_log.name[: -len(can_log.suffix)] if can_log.suffix else can_log.name
    found = {s.name: can_log.with_name(f"{stem}.{s.name}.acraw") for s in rig.sensors}
    return {name: p for name, p in found.items() if p.is_file()}


class Rehearsal:
    """Plays ``can_log`` (and its captures) for one live ride; use as a context manager.

    ``bus`` and ``ports`` are what the ride opens; ``stop`` is set when the played ride is over
    (after ``seconds`` of it when given).
    """

    def __init__(self, rig: Rig, can_log: str | Path, stop: threading.Event, *,
                 seconds: float | None = None) -> None:
        self.can_log = Path(can_log)
        if not self.can_log.is_file():
            raise UsageError(f"--rehearse {self.can_log}: no such CAN log")
        self.stop, self.seconds = stop, seconds
        self.channel = f"crankbeat-rehearsal-{uuid.uuid4().hex[:8]}"
        self.bus = CanBus(interface="virtual", channel=self.channel)
        self._servers: dict[str, socket.socket] = {}
        self.ports: dict[str, str] = {}
        for name in captures_beside(self.can_log, rig):
            srv = socket.create_server(("127.0.0.1", 0))
            srv.settimeout(0.2)
            self._servers[name] = srv
            self.ports[name] = f"socket://127.0.0.1:{srv.getsockname()[1]}"
        self._captures = captures_beside(self.can_log, rig)
        self._done = threading.Event()
        self._start = threading.Event()
        self._t0_wall = 0.0
        self._threads: list[threading.Thread] = []
        self.frames_sent = 0
        self.error: BaseException | None = None

    def __enter__(self) -> Rehearsal:
        self._threads = [threading.Thread(target=self._play_can, daemon=True)]
        self._threads += [threading.Thread(target=self._serve, args=(n,), daemon=True)
                          for n in self._servers]
        for th in self._threads:
            th.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._done.set()
        self._start.set()
        for th in self._threads:
            th.join(timeout=5.0)
        for srv in self._servers.values():
            srv.close()

    def _over(self, elapsed: float) -> bool:
        return self._done.is_set() or (self.seconds is not None and elapsed > self.seconds)

    def _play_can(self) -> None:
        from can.interfaces import virtual

        try:
            with can.Bus(interface="virtual", channel=self.channel) as bus:
                end = time.monotonic() + JOIN_WAIT_S
                while len(virtual.channels.get(self.channel, [])) < 2:  # the ride's joined
                    if self._done.is_set() or time.monotonic() > end:
                        return
                    time.sleep(0.02)
                self._t0_wall = time.monotonic()
                self._start.set()  # the captures start with the frames
                with can.LogReader(str(self.can_log)) as reader:
                    t0 = None
                    for msg in reader:
                        t0 = msg.timestamp if t0 is None else t0
                        if self._over(msg.timestamp - t0):
                            break
                        delay = (msg.timestamp - t0) - (time.monotonic() - self._t0_wall)
                        if delay > 0.002:
                            time.sleep(delay)
                        bus.send(msg)
                        self.frames_sent += 1
                time.sleep(0.5)  # the last frames reach the ride before it is told to stop
        except BaseException as exc:  # noqa: BLE001 - said by the command at the end
            self.error = exc
        finally:
            self.stop.set()  # the played ride is over: end as Ctrl-C would

    def _serve(self, name: str) -> None:
        from crankbeat.logger.serial.capture import CaptureReader

        srv = self._servers[name]
        while not self._done.is_set():
            try:
                conn, _ = srv.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            self._start.wait()
            with conn, CaptureReader(self._captures[name]) as reader:
                try:
                    t0 = None
                    for host_time, data in reader:
                        t0 = host_time if t0 is None else t0
                        if self._over(host_time - t0):
                            break
                        delay = (host_time - t0) - (time.monotonic() - self._t0_wall)
                        if delay > 0.01:
                            time.sleep(delay)
                        conn.sendall(data)
                    while not self._done.is_set():  # the port stays open until the ride ends
                        time.sleep(0.1)
                except OSError:
                    pass  # the ride closed the port
            return


__all__ = ["Rehearsal", "captures_beside"]
