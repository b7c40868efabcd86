"""SIGTERM and SIGHUP end a command as Ctrl-C does: a summary, a clean close, a settled run.

A terminal closed under a ride (SIGHUP), a service manager or ``kill`` (SIGTERM) would otherwise
end the process at once, like ``kill -9``: no summary, files not closed, the run left
"incomplete". Handlers can only be set from the main thread; elsewhere these do nothing.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager

#: Signals that mean "stop now, tidily" besides Ctrl-C (SIGINT).
STOP_SIGNALS = tuple(s for s in (getattr(signal, "SIGTERM", None), getattr(signal, "SIGHUP", None))
                     if s is not None)


def _main_thread() -> bool:
    return threading.current_thread() is threading.main_thread()


@contextmanager
def interrupt_on_signals() -> Iterator[None]:
    """Inside, SIGTERM and SIGHUP raise :class:`KeyboardInterrupt` as Ctrl-C does."""
    if not _main_thread():
        yield
        return

    def _raise(signum, frame):
        raise KeyboardInterrupt(f"ended by {signal.Signals(signum).name}")

    previous = {s: signal.signal(s, _raise) for s in STOP_SIGNALS}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


@contextmanager
def stop_on_signals(stop: threading.Event,
                    on_stop: Callable[[str], None] | None = None) -> Iterator[dict]:
    """Inside, Ctrl-C, SIGTERM and SIGHUP set ``stop`` (a second Ctrl-C interrupts at once).

    Yields a dict whose ``"signal"`` is the name of the signal that asked to stop (None until
    one did); ``on_stop(name)`` is called once, when the first one arrives.
    """
    seen: dict = {"signal": None}
    if not _main_thread():
        yield seen
        return

    def _stop(signum, frame):
        name = signal.Signals(signum).name
        if seen["signal"] is None:
            seen["signal"] = name
            if on_stop is not None:
                on_stop(name)
        stop.set()
        if signum == signal.SIGINT:  # the second Ctrl-C interrupts for real
            signal.signal(signal.SIGINT, signal.default_int_handler)

    previous = {s: signal.signal(s, _stop) for s in (signal.SIGINT, *STOP_SIGNALS)}
    try:
        yield seen
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


__all__ = ["STOP_SIGNALS", "interrupt_on_signals", "stop_on_signals"]
