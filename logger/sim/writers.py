"""Writing a simulated ride to disk as a real rig would have recorded it, and live iterators.

``write_ride`` gives, in ``out_dir``:

* ``<stem><can_format>``: every CAN frame through python-can's own writer for the suffix
  (``.log`` candump, ``.asc``, ``.blf``, ``.csv``, ``.trc``; the text ones also ``+ .gz``);
* ``<stem>.<sensor>.acraw``: each sensor's serial capture file (docs/rig.md format);
* ``<stem>.truth.csv``: the ground truth of every firing event;
* ``<stem>.scenario.toml``: the scenario, which regenerates the ride bit for bit.

Files are reproducible bit for bit from the scenario: no wall-clock time goes into them (the
``.asc`` header date is the ride's start time in UTC; gzip members carry no name or mtime).
"""

from __future__ import annotations

import gzip
import io
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import can
import numpy as np

from crankbeat.errors import InputError
from crankbeat.logger.serial.capture import CaptureWriter
from crankbeat.logger.sim.canframes import CanFrames, build_frames
from crankbeat.logger.sim.scenario import scenario_to_toml
from crankbeat.logger.sim.serialbytes import stream

CAN_FORMATS = (".log", ".asc", ".blf", ".csv", ".trc")
TRUTH_COLUMNS = ("t", "cycle", "cylinder", "fired", "burn_fraction", "retard_deg", "rpm",
                 "throttle", "rough", "fuel_cut")


@dataclass
class RidePaths:
    """What :func:`write_ride` wrote."""

    can: Path
    captures: dict[str, Path] = field(default_factory=dict)
    truth: Path | None = None
    scenario: Path | None = None

    def all(self) -> list[Path]:
        return [self.can, *self.captures.values(), *(p for p in (self.truth, self.scenario) if p)]


class _FixedDateASCWriter(can.ASCWriter):
    """python-can's ASC writer with its header dates fixed (it stamps the wall clock)."""

    def __init__(self, file, *, header_time: float, **kwargs) -> None:
        self._header_dt = datetime.fromtimestamp(header_time, timezone.utc)
        super().__init__(file, **kwargs)

    def _format_header_datetime(self, dt: datetime) -> str:  # noqa: ARG002 - the date is fixed
        return super()._format_header_datetime(self._header_dt)


def _messages(frames: CanFrames, channel: str, fd: bool = False) -> Iterator[can.Message]:
    data = frames.data
    for i in range(len(frames)):
        n = int(frames.dlc[i])
        yield can.Message(
            timestamp=float(frames.t[i]), arbitration_id=int(frames.can_id[i]),
            is_extended_id=bool(frames.extended[i]), dlc=n, data=data[i, :n].tobytes(),
            channel=channel, is_fd=fd or n > 8,
        )


def can_messages(ride) -> Iterator[can.Message]:
    """Every CAN frame of the ride as ``can.Message`` in receive order (for live tests)."""
    return _messages(build_frames(ride), ride.rig.can_bus.channel, ride.rig.can_bus.fd)


def serial_chunks(ride, sensor: str) -> Iterator[tuple[float, bytes]]:
    """The host's port reads of one sensor, ``(host_time, bytes)``, in time order."""
    if sensor not in ride.accel:
        raise InputError(f"rig {ride.rig.name!r} has no sensor {sensor!r}, "
                         f"expected one of {sorted(ride.accel)}")
    return iter(stream(ride, sensor))


def _split_suffix(can_format: str) -> tuple[str, bool]:
    fmt = can_format.lower()
    gz = fmt.endswith(".gz")
    base = fmt[:-3] if gz else fmt
    if base not in CAN_FORMATS:
        raise InputError(f"CAN format {can_format!r} is not one of {', '.join(CAN_FORMATS)} "
                         "(optionally + .gz)")
    if gz and base == ".blf":
        raise InputError("CAN format '.blf.gz' cannot be written: a BLF writer rewrites its header "
                         "at the end (BLF compresses its own objects; use .blf)")
    return base, gz


def _open_writer(path: Path, base: str, gz: bool, start_time: float):
    """(python-can writer, raw file to close afterwards or None)."""
    binary = base == ".blf"
    raw = None
    if gz:
        raw = open(path, "wb")  # noqa: SIM115 - closed by the caller after the writer
        zf = gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0)
        target = zf if binary else io.TextIOWrapper(zf, encoding="utf-8", newline="\n")
    else:
        target = path
    if base == ".asc":
        writer = _FixedDateASCWriter(target, header_time=start_time)
    elif base == ".log":
        writer = can.CanutilsLogWriter(target)
    elif base == ".blf":
        writer = can.BLFWriter(target)
    elif base == ".csv":
        writer = can.CSVWriter(target)
    else:
        writer = can.TRCWriter(target)
    return writer, raw


def write_can(ride, path: str | os.PathLike, *, frames: CanFrames | None = None) -> Path:
    """Write the ride's CAN frames to ``path`` with python-can's writer for its suffix."""
    path = Path(path)
    suffix = "".join(path.suffixes[-2:]) if path.suffix.lower() == ".gz" else path.suffix
    base, gz = _split_suffix(suffix)
    frames = build_frames(ride) if frames is None else frames
    writer, raw = _open_writer(path, base, gz, ride.start_time)
    try:
        for msg in _messages(frames, ride.rig.can_bus.channel, ride.rig.can_bus.fd):
            writer.on_message_received(msg)
    finally:
        writer.stop()
        if raw is not None:
            raw.close()
    return path


def write_truth(ride, path: str | os.PathLike) -> Path:
    """The ground truth CSV: one row per firing event, columns :data:`TRUTH_COLUMNS`."""
    ev = ride.events
    path = Path(path)
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        f.write(",".join(TRUTH_COLUMNS) + "\n")
        cols = [
            np.char.mod("%.6f", ev["t"]), ev["cycle"].astype(str), ev["cylinder"].astype(str),
            ev["fired"].astype(int).astype(str), np.char.mod("%.4f", ev["burn_fraction"]),
            np.char.mod("%.2f", ev["retard_deg"]), np.char.mod("%.2f", ev["rpm"]),
            np.char.mod("%.2f", ev["throttle"]), ev["rough"].astype(int).astype(str),
            ev["fuel_cut"].astype(int).astype(str),
        ]
        for row in zip(*cols):
            f.write(",".join(row) + "\n")
    return path


def read_truth(path: str | os.PathLike) -> np.ndarray:
    """Read a truth CSV back into a :data:`logger.sim.TRUTH_DTYPE` array."""
    from crankbeat.logger.sim.ride import TRUTH_DTYPE

    rows = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    out = np.zeros(len(rows), dtype=TRUTH_DTYPE)
    for i, name in enumerate(TRUTH_COLUMNS):
        out[name] = rows[:, i]
    return out


def write_ride(ride, out_dir: str | os.PathLike, *, can_format: str = ".log",
               stem: str = "ride") -> RidePaths:
    """Write everything a ride produces (see the module docstring) into ``out_dir``.

    Parameters
    ----------
    ride : SimRide
    out_dir : path
        Created if missing.
    can_format : str, keyword-only
        Suffix of the CAN log: ``.log`` (candump, default), ``.asc``, ``.blf``, ``.csv``,
        ``.trc``; the text formats optionally followed by ``.gz``.
    stem : str, keyword-only
        File name stem of every file.
    """
    _split_suffix(can_format)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = RidePaths(can=write_can(ride, out / f"{stem}{can_format}"))
    for name in ride.accel:
        cap = out / f"{stem}.{name}.acraw"
        with CaptureWriter(cap) as w:
            for ts, data in stream(ride, name):
                w.write(ts, data)
        paths.captures[name] = cap
    paths.truth = write_truth(ride, out / f"{stem}.truth.csv")
    paths.scenario = out / f"{stem}.scenario.toml"
    paths.scenario.write_text(scenario_to_toml(ride.scenario), encoding="utf-8")
    return paths
