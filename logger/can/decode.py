"""From CAN frames to the analysis' blocks: tooth periods, cam, status signals, stream health.

:class:`FrameDecoder` knows nothing of the reference rig: every id, layout and role comes from
the :class:`~logger.rig.model.Rig`. Whatever does not fit is counted in
:class:`~logger.chunks.StreamHealth` and described by a one-line note naming the frame's place
in its source (file line or frame number); nothing about it is fatal, and no good frame is lost
because of a bad neighbour.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.logger.can.bits import decode_raw, decode_signal
from crankbeat.logger.can.sources.base import FrameBatch
from crankbeat.logger.chunks import StatusBlock, StreamHealth, TeethBlock
from crankbeat.logger.rig.model import CanMessage, CanSignal, Rig

#: Status roles, in the order their arrays appear in :class:`StatusBlock`.
STATUS_ROLES = ("engine_speed", "throttle", "gear", "coolant", "road_speed")
#: A gap longer than this on a message with a ``rate_hz`` is a time jump, s.
JUMP_S = 0.5
#: Notes kept per kind of problem (the counters keep counting).
NOTES_PER_KIND = 5
#: Frames after which a log with no frame of the rig is called out.
NO_MATCH_AFTER = 1000
#: Two frames of a message without a counter, with the same bytes this close, are one, s.
DUPLICATE_S = 1e-4
#: Tooth frames needed before the plausibility of their periods is judged.
PLAUSIBLE_AFTER = 200


def _key(can_id: int | np.ndarray, extended: bool | np.ndarray) -> np.ndarray:
    return np.asarray(can_id, np.uint64) | (np.asarray(extended, np.uint64) << np.uint64(32))


def _id_text(msg: CanMessage) -> str:
    return f"0x{msg.can_id:08X}" if msg.extended else f"0x{msg.can_id:03X}"


@dataclass
class _MsgState:
    msg: CanMessage
    key: int
    counter: CanSignal | None
    last_counter: int | None = None
    last_ts: float | None = None
    last_data: bytes | None = None


class FrameDecoder:
    """Decode CAN frame batches of one rig into teeth and status blocks.

    Parameters
    ----------
    rig : Rig
        Which ids carry which roles, with their bit layouts.

    Attributes
    ----------
    health : StreamHealth
        Cumulative counters and notes; shared with the stream, which adds the serial side.

    Notes
    -----
    * Error and remote frames are counted and skipped; so are frames of ids the rig does not
      describe, and frames whose DLC differs from the message's ``length``.
    * A message's ``counter`` signal gives the frames lost before each frame,
      ``(c - c_prev - 1) mod modulo`` (``modulo`` defaults to ``2**length``); a repeated value
      counts no loss.
    * When status roles live in several messages, every status frame makes one row and the
      roles not in that frame hold their last value (NaN before their first frame). The same
      holds for a cam signal kept in another message than the tooth periods.
    """

    def __init__(self, rig: Rig, *, health: StreamHealth | None = None) -> None:
        self.rig = rig
        self.health = health if health is not None else StreamHealth()
        self._states = [
            _MsgState(m, int(_key(m.can_id, m.extended)), m.signal_for("counter"))
            for m in rig.messages
        ]
        self._teeth = rig.message_for("tooth_periods")
        self._teeth_sig = self._teeth.signal_for("tooth_periods") if self._teeth else None
        self._cam_msg = rig.message_for("cam_level")
        self._cam_sig = self._cam_msg.signal_for("cam_level") if self._cam_msg else None
        self._last_cam = -1
        self._carry_lost = 0  # tooth frames skipped after the last one handed on
        self._status = {r: rig.message_for(r) for r in STATUS_ROLES if rig.message_for(r)}
        self._status_msgs = sorted({m.name for m in self._status.values()})
        self._last_status = {r: np.nan for r in self._status}
        self._frames_seen = 0
        self._known_seen = 0
        self._last_ts: float | None = None
        self._noted: dict[str, int] = {}
        self._unknown_ids: set[int] = set()
        self._period_stats: list[float] = [0, 0.0, 0.0, 0]
        self._last_tooth_t = np.nan
        self._origin = ""
        self._plausibility_noted = False
        self._no_match_noted = False
        self._cur_data: dict[str, np.ndarray] = {}  # message name -> its frames' bytes

    # ----------------------------------------------------------------- notes
    def _note(self, kind: str, text: str) -> None:
        k = self._noted.get(kind, 0)
        self._noted[kind] = k + 1
        if k < NOTES_PER_KIND:
            self.health.notes.append(text)

    # ------------------------------------------------------------------ push
    def push(self, batch: FrameBatch) -> tuple[TeethBlock, StatusBlock]:
        """Decode one batch (frames in arrival order); state carries over to the next batch."""
        h = self.health
        m = len(batch)
        base = self._frames_seen
        self._frames_seen += m
        h.can_frames += m
        self._origin = batch.origin or self._origin
        if m == 0:
            return self.empty_teeth(), self.empty_status()
        self._check_backwards(batch)

        err = batch.is_error
        rem = batch.is_remote & ~err
        normal = ~err & ~rem
        h.can_error_frames += int(err.sum())
        h.can_remote_frames += int(rem.sum())
        for i in np.flatnonzero(err)[:1]:
            self._note("error", f"{batch.where(int(i))}: CAN error frame (counted, skipped)")
        for i in np.flatnonzero(rem)[:1]:
            self._note("remote", f"{batch.where(int(i))}: remote frame id "
                       f"0x{int(batch.can_id[i]):X} (counted, skipped)")

        self._cur_data = {}
        keys = _key(batch.can_id, batch.extended)
        known = np.zeros(m, bool)
        rows: dict[str, np.ndarray] = {}
        lost: dict[str, np.ndarray] = {}
        for st in self._states:
            sel = normal & (keys == np.uint64(st.key))
            known |= sel
            idx = np.flatnonzero(sel)
            if len(idx):
                rows[st.msg.name], lost_m = self._check_message(st, batch, idx)
                if lost_m is not None:
                    lost[st.msg.name] = lost_m
        self._known_seen += int(known.sum())
        unknown = np.flatnonzero(normal & ~known)
        h.can_unknown_id += len(unknown)
        if len(unknown):
            self._note_unknown(batch, unknown, keys)
        if (not self._no_match_noted and self._known_seen == 0
                and self._frames_seen >= NO_MATCH_AFTER):
            self._note_no_match(batch)

        teeth = self._decode_teeth(batch, rows, lost, base)
        status = self._decode_status(batch, rows)
        if len(teeth):
            self._judge_periods(teeth, batch, rows[self._teeth.name])
        return teeth, status

    def finish(self) -> None:
        """Call at the end of a stream: adds the notes that need the whole of it."""
        if not self._no_match_noted and self._known_seen == 0 and self._frames_seen > 0:
            self._note_no_match(None)
        if not self._plausibility_noted:
            self._judge_periods(None, None, None, final=True)

    # -------------------------------------------------------------- checks
    def _check_backwards(self, batch: FrameBatch) -> None:
        ts = batch.ts
        prev = np.empty_like(ts)
        prev[0] = ts[0] if self._last_ts is None else self._last_ts
        prev[1:] = ts[:-1]
        back = np.flatnonzero(ts < prev)
        self.health.can_time_backwards += len(back)
        for i in back[:NOTES_PER_KIND]:
            self._note("backwards", f"{batch.where(int(i))}: timestamp goes backwards "
                       f"{prev[i]:.6f} -> {ts[i]:.6f} s")
        self._last_ts = float(ts[-1])

    def _check_message(self, st: _MsgState, batch: FrameBatch, idx: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray | None]:
        """The frames of ``st.msg`` that can be decoded, and the frames lost before each."""
        h = self.health
        msg = st.msg
        bad = batch.dlc[idx] != msg.length
        if bad.any():
            h.can_bad_length += int(bad.sum())
            i = int(idx[np.argmax(bad)])
            self._note("dlc", f"{batch.where(i)}: id {_id_text(msg)} ({msg.name}) has "
                       f"{int(batch.dlc[i])} data bytes, expected {msg.length} (frame skipped)")
            idx = idx[~bad]
        idx, counts = self._drop_duplicates(st, batch, idx)
        if len(idx) == 0:
            return idx, None
        ts = batch.ts[idx]
        if msg.rate_hz:
            prev = np.concatenate(([ts[0] if st.last_ts is None else st.last_ts], ts[:-1]))
            jumps = np.flatnonzero(ts - prev > JUMP_S)
            h.can_time_jumps += len(jumps)
            for j in jumps[:NOTES_PER_KIND]:
                self._note("jump", f"{batch.where(int(idx[j]))}: {msg.name} ({_id_text(msg)}, "
                           f"{msg.rate_hz:g} Hz) silent for {ts[j] - prev[j]:.3f} s")
        st.last_ts = float(ts[-1])
        self._cur_data[msg.name] = batch.data[idx]  # gathered once, used by every signal
        if st.counter is None:
            return idx, None
        lost = self._lost(st, batch, idx, counts)
        h.can_lost_frames += int(lost.sum())
        return idx, lost

    def _drop_duplicates(self, st: _MsgState, batch: FrameBatch, idx: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray | None]:
        """Frames of ``st.msg`` that repeat the one before: the same rolling counter value, or
        (without a counter) the same bytes within :data:`DUPLICATE_S`. A bus never repeats a
        frame by itself; a repeat comes from the logging path, and would count its tooth
        periods twice. Returns the frames kept and their counter values (None: no counter)."""
        c = None
        if not len(idx):
            return idx, c
        data = batch.data[idx, : st.msg.length]
        ts = batch.ts[idx]
        if st.counter is not None:
            c = decode_raw(batch.data[idx], st.counter).astype(np.int64)
            prev = np.concatenate(([-1 if st.last_counter is None else st.last_counter], c[:-1]))
            dup = c == prev
        else:
            n = st.msg.length
            last = np.frombuffer(st.last_data, np.uint8) if st.last_data is not None \
                else np.full(n, -1)
            prev_d = np.concatenate((last[None, :n].astype(np.int16), data[:-1]))
            prev_t = np.concatenate(([-np.inf if st.last_ts is None else st.last_ts], ts[:-1]))
            dup = (prev_d == data).all(1) & (np.abs(ts - prev_t) <= DUPLICATE_S)
            st.last_data = data[-1].tobytes()
        if dup.any():
            self.health.can_duplicates += int(dup.sum())
            i = int(idx[np.argmax(dup)])
            self._note("duplicate", f"{batch.where(i)}: {st.msg.name} ({_id_text(st.msg)}) "
                       "repeats the frame before it (duplicate skipped)")
            idx = idx[~dup]
            c = c[~dup] if c is not None else None
        return idx, c

    def _lost(self, st: _MsgState, batch: FrameBatch, idx: np.ndarray, c: np.ndarray
              ) -> np.ndarray:
        """Frames lost before each of ``idx``, from the counter values ``c`` of those frames."""
        sig = st.counter
        assert sig is not None and c is not None
        modulo = int(sig.modulo) if sig.modulo else 1 << sig.length
        prev = np.empty_like(c)
        prev[0] = c[0] - 1 if st.last_counter is None else st.last_counter
        prev[1:] = c[:-1]
        diff = (c - prev) % modulo
        lost = np.where(diff == 0, 0, diff - 1)
        st.last_counter = int(c[-1])
        for j in np.flatnonzero(lost)[:NOTES_PER_KIND]:
            self._note("lost", f"{batch.where(int(idx[j]))}: {st.msg.name} counter "
                       f"{int(prev[j])} -> {int(c[j])}: {int(lost[j])} frame(s) lost")
        return lost

    def _note_unknown(self, batch: FrameBatch, unknown: np.ndarray, keys: np.ndarray) -> None:
        ids, first = np.unique(keys[unknown], return_index=True)
        for k, f in zip(ids.tolist(), first.tolist(), strict=True):
            if k in self._unknown_ids or len(self._unknown_ids) >= 50:
                continue
            self._unknown_ids.add(k)
            i = int(unknown[f])
            ext = bool(batch.extended[i])
            text = f"0x{int(batch.can_id[i]):08X}" if ext else f"0x{int(batch.can_id[i]):03X}"
            self._note("unknown", f"{batch.where(i)}: id {text} is not in rig "
                       f"{self.rig.name!r} (ignored, counted)")

    def _note_no_match(self, batch: FrameBatch | None) -> None:
        self._no_match_noted = True
        ids = ", ".join(_id_text(s.msg) for s in self._states)
        origin = batch.origin if batch is not None and batch.origin else self._origin
        where = f"{origin}: " if origin else ""
        self.health.notes.append(
            f"{where}none of the first {self._frames_seen} frames has an id of rig "
            f"{self.rig.name!r} (expected {ids}): is this the right rig for this log?")

    def _judge_periods(self, teeth: TeethBlock | None, batch: FrameBatch | None,
                       idx: np.ndarray | None, *, final: bool = False) -> None:
        """Do the tooth periods describe a wheel turning in real time?

        The periods a frame carries must add up to about the time since the previous frame
        (one frame per ``count`` teeth; frames with a loss before them are left out), and no
        tooth can be shorter than at twice the rev limit. A wrong byte order, scale or start
        bit breaks both by far.
        """
        if self._plausibility_noted:
            return
        stats = self._period_stats  # [pairs, sum of periods, sum of frame spacing, too short]
        if teeth is not None and len(teeth):
            t = np.concatenate(([self._last_tooth_t], teeth.frame_time))
            dt = np.diff(t)
            p = teeth.periods
            fine = np.isfinite(p).all(1) & (teeth.lost_before == 0) & np.isfinite(dt) & (dt > 0)
            stats[0] += int(fine.sum())
            stats[1] += float(p[fine].sum())
            stats[2] += float(dt[fine].sum())
            shortest = 60.0 / (2.0 * self.rig.limits.rev_limit_rpm * self.rig.wheel.teeth)
            stats[3] += int(np.sum(p[np.isfinite(p)] < shortest))
            self._last_tooth_t = float(teeth.frame_time[-1])
        if stats[0] < PLAUSIBLE_AFTER and not (final and stats[0] > 0):
            return
        ratio = stats[1] / stats[2] if stats[2] > 0 else np.inf
        n_periods = stats[0] * (self._teeth_sig.count if self._teeth_sig else 1)
        too_short = stats[3] / max(n_periods, 1)
        self._plausibility_noted = True  # judged once, on the first frames
        if 0.5 <= ratio <= 2.0 and too_short <= 0.05:
            return
        sig = self._teeth_sig
        where = (batch.where(int(idx[0])) if batch is not None and idx is not None and len(idx)
                 else (self._origin or "stream"))
        self.health.notes.append(
            f"{where}: tooth periods implausible: they add up to {ratio:.3g} times the time "
            f"between their frames (expected about 1), {100 * too_short:.0f}% shorter than a "
            f"tooth at twice the rev limit; check byte order, scale and start bit of signal "
            f"{sig.name if sig else '?'!r}")

    # ------------------------------------------------------------- decoding
    def empty_teeth(self) -> TeethBlock:
        k = self._teeth_sig.count if self._teeth_sig else 1
        return TeethBlock(np.zeros(0), np.zeros((0, k)), np.zeros(0, np.int8),
                          np.zeros(0, np.int32), np.zeros(0, np.int64))

    def empty_status(self) -> StatusBlock:
        return StatusBlock(np.zeros(0), {r: np.zeros(0) for r in self._status})

    def _decode_teeth(self, batch: FrameBatch, rows: dict[str, np.ndarray],
                      lost: dict[str, np.ndarray], base: int) -> TeethBlock:
        if self._teeth is None or self._teeth.name not in rows or not len(rows[self._teeth.name]):
            self._update_cam(batch, rows)
            return self.empty_teeth()
        assert self._teeth_sig is not None
        idx = rows[self._teeth.name]
        periods = decode_signal(self._cur_data[self._teeth.name], self._teeth_sig)
        periods = periods.reshape(len(idx), -1)
        lt = lost.get(self._teeth.name)
        lost_before = np.zeros(len(idx), np.int32) if lt is None else lt.astype(np.int32)
        cam = self._cam_at(batch, rows, idx)
        block = TeethBlock(
            frame_time=batch.ts[idx].astype(np.float64),
            periods=periods,
            cam=cam,
            lost_before=lost_before,
            frame_index=idx.astype(np.int64) + base,
        )
        return self._drop_bad_periods(block, batch, idx)

    def _drop_bad_periods(self, b: TeethBlock, batch: FrameBatch, idx: np.ndarray
                          ) -> TeethBlock:
        """Tooth frames holding a period <= 0 s cannot be right: skip them as lost frames
        (the next frame kept carries them in ``lost_before``, so the tooth count stays)."""
        bad = (b.periods <= 0).any(1) | np.isinf(b.periods).any(1)
        if not bad.any() and not self._carry_lost:
            return b
        if bad.any():
            self.health.can_bad_values += int(bad.sum())
            i = int(np.argmax(bad))
            self._note("period", f"{batch.where(int(idx[i]))}: tooth period "
                       f"{float(b.periods[i].min()):.6g} s is not > 0 (frame skipped as lost)")
        dropped = np.where(bad, b.lost_before.astype(np.int64) + 1, 0)
        cs = np.cumsum(dropped) + self._carry_lost
        keep = np.flatnonzero(~bad)
        before = np.concatenate(([0], cs[keep][:-1])) if len(keep) else keep
        add = cs[keep] - before
        self._carry_lost = int(cs[-1] - (cs[keep[-1]] if len(keep) else 0)) if len(keep) \
            else int(cs[-1])
        return TeethBlock(b.frame_time[keep], b.periods[keep], b.cam[keep],
                          (b.lost_before[keep] + add).astype(np.int32), b.frame_index[keep])

    def _cam_values(self, batch: FrameBatch, rows: dict[str, np.ndarray]
                    ) -> tuple[np.ndarray, np.ndarray]:
        assert self._cam_msg is not None and self._cam_sig is not None
        cidx = rows.get(self._cam_msg.name, np.zeros(0, np.int64))
        if not len(cidx):
            return cidx, np.zeros(0, np.int8)
        return cidx, decode_raw(self._cur_data[self._cam_msg.name], self._cam_sig).astype(np.int8)

    def _cam_at(self, batch: FrameBatch, rows: dict[str, np.ndarray], idx: np.ndarray
                ) -> np.ndarray:
        if self._cam_sig is None:
            return np.full(len(idx), -1, np.int8)
        cidx, vals = self._cam_values(batch, rows)
        if self._cam_msg is self._teeth:
            out = vals
        else:  # hold the last cam frame received at or before each tooth frame
            k = np.searchsorted(cidx, idx, side="right") - 1
            held = np.concatenate(([self._last_cam], vals)).astype(np.int8)
            out = held[k + 1]
        if len(vals):
            self._last_cam = int(vals[-1])
        return out

    def _update_cam(self, batch: FrameBatch, rows: dict[str, np.ndarray]) -> None:
        if self._cam_sig is not None:
            _, vals = self._cam_values(batch, rows)
            if len(vals):
                self._last_cam = int(vals[-1])

    def _decode_status(self, batch: FrameBatch, rows: dict[str, np.ndarray]) -> StatusBlock:
        if not self._status:
            return self.empty_status()
        present = [rows[n] for n in self._status_msgs if n in rows and len(rows[n])]
        if not present:
            return self.empty_status()
        all_rows = np.unique(np.concatenate(present)) if len(present) > 1 else present[0]
        values: dict[str, np.ndarray] = {}
        for role, msg in self._status.items():
            sig = msg.signal_for(role)
            assert sig is not None
            ridx = rows.get(msg.name, np.zeros(0, np.int64))
            v = decode_signal(self._cur_data[msg.name], sig) if len(ridx) else np.zeros(0)
            if len(present) == 1:
                values[role] = v.astype(np.float64)
            else:
                k = np.searchsorted(ridx, all_rows, side="right") - 1
                held = np.concatenate(([self._last_status[role]], v))
                values[role] = held[k + 1].astype(np.float64)
            if len(v):
                self._last_status[role] = float(v[-1])
        return StatusBlock(t=batch.ts[all_rows].astype(np.float64), values=values)
