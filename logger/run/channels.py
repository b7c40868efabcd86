"""The run's time channels: the ECU status the rig decodes, kept at a modest rate.

Status frames come at 50–100 Hz; a trend filter ("misfire rate in 3rd gear", "with the coolant
between 80 and 95 °C") and a plot need far less. :class:`ChannelDecimator` keeps, per bin of
:data:`CHANNEL_BIN_S` seconds of CAN time, the bin's last sample (its own time and value: a gear
or a counter must not be averaged into a value it never had). Bins are on the CAN clock, so the
rows do not depend on how the stream was chunked.
"""

from __future__ import annotations

import numpy as np

from crankbeat.logger.chunks import StatusBlock

#: Bin width of the stored channels, s (10 Hz).
CHANNEL_BIN_S = 0.1
#: Stored channel name and unit of each status role the rig can decode.
CHANNELS: dict[str, tuple[str, str]] = {
    "engine_speed": ("rpm", "rpm"),
    "throttle": ("throttle", "%"),
    "gear": ("gear", ""),
    "coolant": ("coolant", "degC"),
    "road_speed": ("road_speed", "km/h"),
}


def channel_unit(name: str) -> str:
    """Unit of a stored channel ("" when unknown or dimensionless)."""
    for stored, unit in CHANNELS.values():
        if stored == name:
            return unit
    return ""


class ChannelDecimator:
    """Streaming decimation of the status channels to one sample per bin.

    ``push(block)`` takes a :class:`logger.chunks.StatusBlock`; :meth:`take` returns the rows
    that became final since the last call as ``{name: (t, value)}`` (arrays, s and the channel's
    unit); :meth:`finish` flushes the last bin.
    """

    def __init__(self, bin_s: float = CHANNEL_BIN_S) -> None:
        self.bin_s = float(bin_s)
        self._t = np.empty(0)
        self._v: dict[str, np.ndarray] = {}
        self._ready: dict[str, list[tuple[np.ndarray, np.ndarray]]] = {}

    def push(self, block: StatusBlock, *, final: bool = False) -> None:
        roles = [r for r in block.values if r in CHANNELS] if len(block) else []
        if roles:
            self._t = np.r_[self._t, block.t]
            for role in roles:
                old = self._v.get(role, np.full(len(self._t) - len(block.t), np.nan))
                self._v[role] = np.r_[old, block.values[role]]
            for role in self._v:  # a role absent from this block (none expected) stays NaN
                if len(self._v[role]) < len(self._t):
                    pad = np.full(len(self._t) - len(self._v[role]), np.nan)
                    self._v[role] = np.r_[self._v[role], pad]
        if not len(self._t):
            return
        ok = np.isfinite(self._t)
        if not ok.all():
            self._t = self._t[ok]
            self._v = {r: v[ok] for r, v in self._v.items()}
        bins = np.floor(self._t / self.bin_s)
        # last sample of each bin; the newest bin stays open until a later bin starts
        last = np.flatnonzero(np.r_[bins[1:] != bins[:-1], True])
        cut = len(self._t) if final else (int(last[-2]) + 1 if len(last) > 1 else 0)
        keep = last[last < cut]
        if len(keep):
            for role, v in self._v.items():
                name = CHANNELS[role][0]
                self._ready.setdefault(name, []).append((self._t[keep], v[keep]))
        self._t = self._t[cut:]
        self._v = {r: v[cut:] for r, v in self._v.items()}

    def finish(self) -> None:
        self.push(StatusBlock(np.empty(0), {}), final=True)

    def take(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Final rows since the last call, per channel."""
        out = {}
        for name, parts in self._ready.items():
            if parts:
                t = np.concatenate([p[0] for p in parts])
                v = np.concatenate([p[1] for p in parts])
                out[name] = (t, v)
        self._ready = {}
        return out


def concat_channels(parts: list[dict[str, tuple[np.ndarray, np.ndarray]]]
                    ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Join several :meth:`ChannelDecimator.take` results, channel by channel, in order."""
    out: dict[str, list] = {}
    for part in parts:
        for name, tv in part.items():
            out.setdefault(name, []).append(tv)
    return {n: (np.concatenate([p[0] for p in ps]), np.concatenate([p[1] for p in ps]))
            for n, ps in out.items()}
