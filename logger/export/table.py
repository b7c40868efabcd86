"""The one table every export writer takes, and the tables of a stored run.

An :class:`ExportTable` is a name, columns of equal length (numpy arrays), a unit per column
and, for coded columns, the text of each code (a verdict is stored as a number, read as a
word). The first column is the table's time axis, s on the CAN log's time base.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from crankbeat.dsp.events import MISFIRE, VERDICT_NAMES
from crankbeat.logger.run.channels import channel_unit

#: Columns of the events table; ``misfire`` is 0/1 and ``verdict`` a code with its name.
EVENT_COLUMNS = (
    "t", "cycle", "cylinder", "misfire", "verdict", "rpm", "throttle", "metric", "threshold",
    "confidence", "interval_deg", "expected_interval_deg", "contribution",
)
EVENT_UNITS = {
    "t": "s", "rpm": "rpm", "throttle": "%", "threshold": "", "interval_deg": "deg",
    "expected_interval_deg": "deg",
}


@dataclass
class ExportTable:
    """Columns to export. ``labels[col]`` maps the codes of a coded column to their text."""

    name: str
    columns: dict[str, np.ndarray]
    units: dict[str, str] = field(default_factory=dict)
    labels: dict[str, dict[int, str]] = field(default_factory=dict)
    meta: dict[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        lengths = {len(v) for v in self.columns.values()}
        if len(lengths) > 1:
            raise ValueError(f"table {self.name}: columns of different lengths {sorted(lengths)}")

    def __len__(self) -> int:
        return len(next(iter(self.columns.values()))) if self.columns else 0

    @property
    def time_column(self) -> str:
        return next(iter(self.columns))

    def text(self, col: str) -> list:
        """A column as Python values, coded columns as their text."""
        values = self.columns[col].tolist()
        labels = self.labels.get(col)
        if labels is None:
            return values
        return [labels.get(int(v), str(v)) for v in values]


def events_table(events: np.ndarray, *, meta: dict[str, str] | None = None) -> ExportTable:
    """The events table of an :data:`dsp.events.EVENT_DTYPE` array."""
    cols = {}
    for c in EVENT_COLUMNS:
        if c == "misfire":
            cols[c] = (events["verdict"] == MISFIRE).astype(np.int8)
        else:
            cols[c] = np.asarray(events[c])
    return ExportTable("events", cols, units=dict(EVENT_UNITS),
                       labels={"verdict": dict(VERDICT_NAMES)}, meta=dict(meta or {}))


def channels_table(channels: dict[str, tuple[np.ndarray, np.ndarray]], *,
                   meta: dict[str, str] | None = None) -> ExportTable:
    """The status channels as one wide table on the union of their times (NaN where a
    channel has no sample at a time)."""
    names = sorted(channels)
    t = np.unique(np.concatenate([channels[n][0] for n in names])) if names else np.empty(0)
    cols = {"t": t}
    for n in names:
        ct, cv = channels[n]
        col = np.full(len(t), np.nan)
        col[np.searchsorted(t, ct)] = cv
        cols[n] = col
    units = {"t": "s", **{n: channel_unit(n) for n in names}}
    return ExportTable("channels", cols, units=units, meta=dict(meta or {}))


def run_meta(store, run_id: int) -> dict[str, str]:
    """What a file says about its run: id, rig, label, start, analyser."""
    info = store.run(run_id)
    out = {"run": str(run_id), "rig": str(info.get("rig")), "started_at": str(info["started_at"]),
           "analyser": str(info.get("analyser") or "unknown")}
    if info.get("label"):
        out["label"] = str(info["label"])
    return out
