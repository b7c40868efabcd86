"""Raw port reads of one sensor in, time-aligned acceleration samples out.

:class:`SerialDecoder` chains the frame parser and the clock aligner: records
``(host_time, bytes)`` from a live :class:`~logger.serial.port.PortReader` or a
:class:`~logger.serial.capture.CaptureReader` go in, an :class:`~logger.chunks.AccelBlock` on the
CAN time base comes out. Samples leave one to two clock windows after they arrive (the aligner's
bounded lookahead), so live and replay give the same numbers; :meth:`SerialDecoder.flush` hands
over the rest at the end of the stream.
"""

from __future__ import annotations

import numpy as np

from crankbeat.logger.chunks import AccelBlock
from crankbeat.logger.rig.model import SerialSensor
from crankbeat.logger.serial.parser import FrameCounts, SerialFrameParser
from crankbeat.logger.timebase import ClockAligner

#: Notes kept per decoder (the first ones tell the story; the counters keep the totals).
MAX_NOTES = 20
#: Bytes without a single good frame before the decoder says the framing looks wrong.
_SILENT_BYTES = 4096
#: A device clock further off the host's than this is a wrong unit in the rig, not a crystal
#: (crystals are specified to tens of ppm; common practice).
_DRIFT_LIMIT = 1e-3


#: One sensor's counters: the parser's :class:`~logger.serial.parser.FrameCounts`.
SerialHealth = FrameCounts


class SerialDecoder:
    """Parser plus clock aligner for one sensor.

    Parameters
    ----------
    sensor : SerialSensor
        The board's description from the rig.
    window_s, span_windows : optional
        Passed to :class:`~logger.timebase.ClockAligner`.

    Attributes
    ----------
    health : SerialHealth
        Counters since the start.
    notes : list of str
        The first few one-line messages, e.g. ``"bar_left: 12 corrupt frames at host t=103.2 s"``.
    """

    def __init__(self, sensor: SerialSensor, *, window_s: float = 1.0, span_windows: int = 60):
        self.sensor = sensor
        self.parser = SerialFrameParser(sensor)
        # Hold at most 30 s of samples even if the board's clock stops advancing.
        self.aligner = ClockAligner(window_s=window_s, span_windows=span_windows,
                                    max_pending=max(1000, int(30 * sensor.sample_rate_hz)))
        self.health = self.parser.counts  # one set of counters
        self.notes: list[str] = []
        self._xyz = np.zeros((0, 3))
        self._gap = np.zeros(0, dtype=bool)
        self._bytes_since_good = 0
        self._silence_noted = False
        self._drift_noted = False
        self._stuck_noted = False

    def push(self, records: list[tuple[float, bytes]]) -> AccelBlock:
        """Decode port reads; return the samples whose time is now final (maybe none)."""
        if not records:
            return self._block(np.zeros(0), 0)
        before = self._counts()
        frames = self.parser.push_records(records)
        self._note_changes(before, records, frames)
        self._xyz = np.concatenate([self._xyz, frames.accel])
        self._gap = np.concatenate([self._gap, (frames.lost_before > 0) | frames.break_before])
        t = self.aligner.push(frames.device_t, frames.host_time, pair=frames.last_in_read,
                              epoch_before=frames.break_before)
        self._check_drift(records)
        if self.aligner.forced and not self._stuck_noted:
            self._stuck_noted = True
            self._note(f"device clock not advancing by host t={records[-1][0]:.1f} s: samples "
                       "released with the last clock fit")
        return self._release(t)

    def flush(self) -> AccelBlock:
        """End of stream: every sample still held, with the latest clock fit."""
        return self._release(self.aligner.flush())

    # -- internals ------------------------------------------------------------------------
    def _release(self, t: np.ndarray) -> AccelBlock:
        n = len(t)
        block = self._block(t, n)
        self._xyz = self._xyz[n:]
        self._gap = self._gap[n:]
        return block

    def _block(self, t: np.ndarray, n: int) -> AccelBlock:
        return AccelBlock(sensor=self.sensor.name, t=np.asarray(t, dtype=np.float64),
                          xyz=self._xyz[:n].copy(), gap_before=self._gap[:n].copy())

    def _counts(self) -> tuple[int, int, int, int, int, int, int]:
        c = self.parser.counts
        return c.good, c.corrupt, c.lost, c.skipped, c.breaks, c.clock_jumps, c.host_steps

    def _note(self, text: str) -> None:
        if len(self.notes) < MAX_NOTES:
            self.notes.append(f"{self.sensor.name}: {text}")

    def _check_drift(self, records) -> None:
        fit = self.aligner.fit
        if self._drift_noted or fit is None or self.aligner.windows < 5:
            return
        drift = fit[1]
        if abs(drift) > _DRIFT_LIMIT:
            self._drift_noted = True
            self._note(f"device clock runs {drift * 1e6:+.0f} ppm against the host clock by host "
                       f"t={records[-1][0]:.1f} s: check device_time_unit_s "
                       f"({self.sensor.device_time_unit_s:g} s) and sample_rate_hz in the rig")

    def _note_changes(self, before, records, frames) -> None:
        good, corrupt, lost, skipped, breaks, jumps, steps = self._counts()
        at = f"host t={records[0][0]:.1f} s"
        if corrupt > before[1]:
            self._note(f"{corrupt - before[1]} corrupt frames at {at}")
        if lost > before[2]:
            where = frames.host_time[frames.lost_before > 0]
            at_lost = f"host t={where[0]:.1f} s" if len(where) else at
            self._note(f"{lost - before[2]} frames lost at {at_lost}")
        if breaks > before[4]:
            self._note(f"link broke {breaks - before[4]} time(s) at {at} (adapter pulled or "
                       "queue overflow); samples resume after a gap")
        if jumps > before[5]:
            t_jump = frames.host_time[frames.break_before][0] if len(frames) else records[0][0]
            self._note(f"device clock jumped at host t={t_jump:.1f} s (board reset?); "
                       "clock fit restarted")
        if steps > before[6]:
            step = self.parser.host_step_s[-1]
            self._note(f"host clock stepped {step:+.3f} s by host t={records[-1][0]:.1f} s "
                       "(device clock and sequence run on): later host times taken back by "
                       "the step, no samples lost")
        if good > before[0]:
            self._bytes_since_good = 0
        else:
            self._bytes_since_good += sum(len(d) for _, d in records)
            if self._bytes_since_good >= _SILENT_BYTES and not self._silence_noted:
                self._silence_noted = True
                self._note(f"{self._bytes_since_good} bytes without a valid frame by {at}: "
                           "check the baud rate and the rig's serial framing")
