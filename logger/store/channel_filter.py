"""Trend filters on the run's status channels: "misfire rate in 3rd gear", "coolant 80-95 °C".

A filter is ``NAME=VALUE`` (e.g. ``gear=3``) or ``NAME=LO-HI`` (``coolant=80-95``: LO <= value <
HI). An event passes when the channel's last stored sample at or before the event's time (at
most :data:`MAX_AGE_S` older) passes. Event metrics are then computed here from the events in
numpy, with the same definitions as :mod:`logger.store.trend`'s SQL.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from crankbeat.dsp.events import COUNTED_VERDICTS, FIRED, MISFIRE
from crankbeat.errors import UsageError

if TYPE_CHECKING:
    from crankbeat.logger.store.store import Store

#: Oldest channel sample still taken as the value at an event, s (channels are stored at 10 Hz).
MAX_AGE_S = 0.5

_NUMBER = r"(-?\d+(?:\.\d*)?)"
_FILTER = re.compile(rf"^\s*([A-Za-z_]\w*)\s*=\s*{_NUMBER}(?:\s*-\s*{_NUMBER})?\s*$")


@dataclass(frozen=True)
class ChannelFilter:
    """Events whose channel ``name`` lies in [lo, hi) (``lo == hi``: equals lo)."""

    name: str
    lo: float
    hi: float

    def passes(self, values: np.ndarray) -> np.ndarray:
        if self.lo == self.hi:
            return values == self.lo
        return (values >= self.lo) & (values < self.hi)


def parse_channel_filter(text: str) -> ChannelFilter:
    """``"gear=3"`` or ``"coolant=80-95"``; anything else is a :class:`UsageError`."""
    m = _FILTER.match(str(text))
    if not m:
        raise UsageError(f"bad channel filter '{text}': expected NAME=VALUE or NAME=LO-HI, "
                         "e.g. gear=3 or coolant=80-95")
    lo = float(m.group(2))
    hi = float(m.group(3)) if m.group(3) is not None else lo
    if hi < lo:
        raise UsageError(f"bad channel filter '{text}': the low end must not be above the high")
    return ChannelFilter(m.group(1), lo, hi)


def channel_at(t_channel: np.ndarray, values: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Value of a channel at times ``t``: its last sample at or before, NaN if none within
    :data:`MAX_AGE_S`."""
    out = np.full(len(t), np.nan)
    if not len(t_channel):
        return out
    i = np.searchsorted(t_channel, t, side="right") - 1
    ok = (i >= 0) & np.isfinite(t)
    ok[ok] &= (t[ok] - t_channel[i[ok]]) <= MAX_AGE_S
    out[ok] = values[i[ok]]
    return out


def channel_event_metric(store: Store, metric: str, run_id: int, cylinder: int | None,
                         band: tuple[float, float] | None, flt: ChannelFilter
                         ) -> list[tuple[str, float | None, int]]:
    """One run's event metric per cylinder, over the events that pass ``flt``."""
    ev = store.events(run_id, cylinder=cylinder)
    ch = store.channels(run_id, names=[flt.name]).get(flt.name)
    if ch is None:
        return []  # a run without that channel has no value under the filter
    keep = flt.passes(channel_at(ch[0], ch[1], ev["t"]))
    if band is not None:
        keep &= (ev["rpm"] >= band[0]) & (ev["rpm"] < band[1])
    ev = ev[keep]
    out = []
    for cyl in np.unique(ev["cylinder"]):
        e = ev[ev["cylinder"] == cyl]
        fired = e["verdict"] == FIRED
        if metric == "misfire_rate":
            n = int(np.sum(np.isin(e["verdict"], COUNTED_VERDICTS)))
            value = 100.0 * np.sum(e["verdict"] == MISFIRE) / n if n else None
        else:
            x = (e["interval_deg"] - e["expected_interval_deg"] if metric == "interval_error"
                 else e["contribution"])[fired]
            x = x[np.isfinite(x)]
            n = len(x)
            value = float(np.mean(x)) if n else None
        out.append((f"cyl {int(cyl)}", None if value is None else float(value), n))
    return out
