"""A watchdog around the live CAN bus: silence is seen, said, waited out cheaply, and repaired.

When the link under a python-can bus goes away, some interfaces return at once with nothing
instead of waiting (a socketcand server that closed its socket is readable for ever): the reader
then spins a core and, with no frame, no chunk closes and the screen freezes. Here, after
:data:`SILENCE_S` without a frame the bus is polled without waiting and the thread sleeps
between polls (backing off up to :data:`MAX_BACKOFF_S`; interfaces that queue frames - kernel
sockets, python-can's virtual bus - lose nothing by it); ``on_idle`` is called a few times a
second so the screen shows the silence. Where the interface is a network link
(:data:`RECONNECT_ON_SILENCE`), or a receive fails, the bus is closed and opened again, at
growing intervals, until frames come back. Every silence longer than :data:`SILENCE_S` is kept
as a break (wall-clock times) for the run's notes.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Callable
from dataclasses import dataclass

import can

from crankbeat.errors import SourceError
from crankbeat.logger.rig.model import CanBus

#: No frame for this long is a silence, s.
SILENCE_S = 1.0
#: A silent network link is opened again after this long, s.
RECONNECT_AFTER_S = 2.0
#: Longest sleep between polls of a silent bus, and between attempts to open it again, s.
MAX_BACKOFF_S = 2.0
#: How often the screen hears of a silence, s.
IDLE_EVERY_S = 0.25
#: Interfaces whose silence usually means the link (not the bus) is gone: reconnect on silence.
RECONNECT_ON_SILENCE = frozenset({"socketcand", "remote"})


@dataclass
class LinkBreak:
    """The bus gave no frame from ``start`` (wall clock, epoch s) for ``seconds``."""

    start: float
    seconds: float
    reconnected: bool

    def as_dict(self) -> dict:
        return {"start": self.start, "seconds": self.seconds, "reconnected": self.reconnected}


def open_bus(cfg: CanBus) -> can.BusABC:
    """Open a python-can bus as :class:`~logger.can.sources.BusSource` would."""
    kwargs: dict[str, object] = {"interface": cfg.interface, "channel": cfg.channel}
    if cfg.interface != "virtual":
        kwargs["bitrate"] = cfg.bitrate
    if cfg.fd:
        kwargs["fd"] = True
    try:
        return can.Bus(**kwargs)
    except (can.CanError, OSError, ValueError, ImportError) as exc:
        raise SourceError(f"CAN bus {cfg.interface}:{cfg.channel}: cannot open ({exc})") from None


def _reachable(cfg: CanBus) -> bool:
    """Can the bus be opened now? For a socketcand server, is its port answering (python-can's
    own connect retries for 10 s in a busy loop, so it is asked only when this says yes)."""
    if cfg.interface != "socketcand":
        return True
    conf = can.util.load_config(config={"interface": cfg.interface, "channel": cfg.channel})
    host, port = conf.get("host"), conf.get("port")
    if not host or not port:
        return True
    try:
        with socket.create_connection((str(host), int(port)), timeout=0.5):
            return True
    except OSError:
        return False


class WatchedBus(can.BusABC):
    """A python-can bus that watches for silence and reopens a lost link.

    Parameters
    ----------
    cfg : CanBus
        Where the bus is (opened here, and again after a lost link).
    on_idle : callable, optional
        Called with the watchdog itself while the bus is silent, at most every
        :data:`IDLE_EVERY_S` (to redraw the screen).
    reconnect_on_silence : bool, optional
        Reopen a silent bus; default: for the interfaces of :data:`RECONNECT_ON_SILENCE`.
    """

    def __init__(self, cfg: CanBus, *, on_idle: Callable[[WatchedBus], None] | None = None,
                 reconnect_on_silence: bool | None = None, silence_s: float = SILENCE_S,
                 reconnect_after_s: float = RECONNECT_AFTER_S,
                 max_backoff_s: float = MAX_BACKOFF_S) -> None:
        self.cfg = cfg
        self._bus: can.BusABC | None = open_bus(cfg)
        self.channel_info = f"{cfg.interface}:{cfg.channel}"
        super().__init__(channel=cfg.channel)
        self.on_idle = on_idle
        self.reconnect_on_silence = (cfg.interface in RECONNECT_ON_SILENCE
                                     if reconnect_on_silence is None else reconnect_on_silence)
        self.silence_s, self.reconnect_after_s = float(silence_s), float(reconnect_after_s)
        self.max_backoff_s = float(max_backoff_s)
        self.census: dict[int, int] = {}
        self.frames = 0
        self.reconnects = 0
        self.breaks: list[LinkBreak] = []
        self.polls = 0  # calls into the underlying bus (a spinning link shows here)
        self._last_frame = time.monotonic()
        self._last_frame_wall = time.time()
        self._backoff = 0.05
        self._next_attempt = 0.0
        self._last_idle = 0.0
        self._failure: str | None = None

    # -- state shown on screen ---------------------------------------------------------
    @property
    def silent_for(self) -> float:
        return time.monotonic() - self._last_frame

    def state_line(self) -> str | None:
        """One line for the screen while the bus is silent or down (None when frames flow)."""
        quiet = self.silent_for
        if quiet < self.silence_s:
            return None
        what = f"CAN {self.channel_info}: no frame for {quiet:.0f} s"
        if self._bus is None:
            reason = f" ({self._failure})" if self._failure else ""
            return f"{what}: link down{reason}, reconnecting every {self._backoff:.0f} s"
        if self.reconnect_on_silence:
            return f"{what}: link may be gone, reconnecting"
        return f"{what}: engine off, or bus/cable disconnected?"

    # -- python-can bus ----------------------------------------------------------------
    def recv(self, timeout: float | None = None) -> can.Message | None:
        wait = 0.05 if timeout is None else max(float(timeout), 0.0)
        if self._bus is None or self._should_reconnect():
            self._reconnect()
        if self._bus is None:
            return self._idle(wait)
        silent = self.silent_for >= self.silence_s
        try:
            self.polls += 1
            msg = self._bus.recv(0.0 if silent else wait)
        except (can.CanError, OSError) as exc:
            self._lose(str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
            return self._idle(wait)
        if msg is None:
            return self._idle(wait) if silent else self._notify_idle()
        self._got(msg)
        return msg

    def _got(self, msg: can.Message) -> None:
        now = time.monotonic()
        quiet = now - self._last_frame
        if quiet >= self.silence_s:
            self.breaks.append(LinkBreak(self._last_frame_wall, quiet,
                                         reconnected=self._reconnected_since_frame))
        self._reconnected_since_frame = False
        self._last_frame, self._last_frame_wall = now, time.time()
        self._backoff = 0.05
        self.frames += 1
        if not msg.is_error_frame:
            self.census[msg.arbitration_id] = self.census.get(msg.arbitration_id, 0) + 1

    _reconnected_since_frame = False

    def _idle(self, wait: float) -> None:
        # back off: a silent (or spinning) link is polled a few times a second, not thousands
        self._backoff = min(self.max_backoff_s, max(self._backoff * 2, 0.05))
        time.sleep(min(self._backoff, max(wait, 0.05)))
        return self._notify_idle()

    def _notify_idle(self) -> None:
        now = time.monotonic()
        if (self.on_idle is not None and now - self._last_frame >= self.silence_s
                and now - self._last_idle >= IDLE_EVERY_S):
            self._last_idle = now
            self.on_idle(self)
        return None

    def _should_reconnect(self) -> bool:
        return (self.reconnect_on_silence and self.silent_for >= self.reconnect_after_s
                and time.monotonic() >= self._next_attempt)

    def _lose(self, why: str) -> None:
        self._failure = why
        self._close_inner()

    def _close_inner(self) -> None:
        bus, self._bus = self._bus, None
        if bus is not None:
            try:
                bus.shutdown()
            except (can.CanError, OSError):
                pass

    def _reconnect(self) -> None:
        now = time.monotonic()
        if now < self._next_attempt:
            return
        self._next_attempt = now + max(self._backoff, 0.5)
        self._close_inner()
        if not _reachable(self.cfg):
            self._failure = self._failure or "not reachable"
            return
        try:
            self._bus = open_bus(self.cfg)
        except SourceError as exc:
            self._failure = str(exc)
            return
        self.reconnects += 1
        self._reconnected_since_frame = True
        self._failure = None

    def send(self, msg: can.Message, timeout: float | None = None) -> None:
        if self._bus is None:
            raise can.CanOperationError(f"{self.channel_info}: link down")
        self._bus.send(msg, timeout)

    def shutdown(self) -> None:
        self._close_inner()
        super().shutdown()

    # -- for the run ---------------------------------------------------------------------
    def summary(self) -> dict:
        return {"can_link_breaks": [b.as_dict() for b in self.breaks],
                "can_reconnects": self.reconnects}

    def fault_lines(self) -> list[str]:
        """Decisive notes: each silence of the link (wall-clock start, length, reconnected)."""
        out = []
        for b in self.breaks:
            when = time.strftime("%H:%M:%S", time.gmtime(b.start))
            again = ", reconnected" if b.reconnected else ""
            out.append(f"CAN {self.channel_info}: no frame for {b.seconds:.1f} s from {when} UTC"
                       f"{again}: nothing was judged meanwhile")
        quiet = self.silent_for
        if quiet >= self.silence_s:
            out.append(f"CAN {self.channel_info}: no frame in the last {quiet:.1f} s of the ride")
        return out


__all__ = ["LinkBreak", "WatchedBus", "open_bus"]
