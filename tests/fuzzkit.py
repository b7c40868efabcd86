"""Damage recordings on purpose and check what every reader keeps (tests and ``make fuzz``).

One *round* writes a clean recording of random frames or records with an independent writer
(python-can's writers for CAN logs, the capture writer, the frame encoder), damages a share of
its units (lines, BLF objects, capture records, serial frames) in random ways, reads the damaged
file with crankbeat's reader and compares with a reference reading of the undamaged units only:

* CAN logs: python-can's own reader on a file holding only the undamaged lines (text formats)
  or the undamaged frames written afresh (BLF);
* capture files: the undamaged records as written (the obvious reader);
* serial frames: the undamaged frames as encoded.

A reader passes a round when it raises nothing but crankbeat's own errors (a one-line message)
and every reference frame is among the frames it gives (damaged units may give frames too: a
flipped data digit is still a frame). :class:`Tally` counts tried units, clean answers, crashes
and frames kept.
"""

from __future__ import annotations

import math
import random
import struct
import traceback
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import can
import numpy as np

from crankbeat.errors import CrankbeatError
from crankbeat.logger.can.sources import CandumpFastSource, LogFileSource, concat
from crankbeat.logger.rig import load_rig
from crankbeat.logger.serial.capture import MAGIC, CaptureReader
from crankbeat.logger.serial.frames import encode_frames
from crankbeat.logger.serial.parser import SerialFrameParser

FORMATS = ("candump-fast", "candump-python-can", "asc", "csv", "trc", "blf", "acraw",
           "serial-frames", "rig")
_SUFFIX = {"candump-fast": ".log", "candump-python-can": ".log", "asc": ".asc", "csv": ".csv",
           "trc": ".trc", "blf": ".blf"}
_GARBAGE = [b"", b" ", b"#", b"(", b")", b"\x00", b"\r", b"\xff\xfe", b"nan", b"inf", b"-",
            b"0x", b"R", b"##", b";", b",", b"\t", b"9" * 30, b".", b"\xc3"]


@dataclass
class Tally:
    """What the rounds of one format found."""

    tried: int = 0  # damaged units
    files: int = 0
    clean: int = 0  # files answered with frames or one crankbeat error
    crashes: int = 0
    ref_frames: int = 0
    kept: int = 0
    examples: list[str] = field(default_factory=list)  # first tracebacks / losses

    def add_crash(self, exc: BaseException) -> None:
        self.crashes += 1
        if len(self.examples) < 3:
            self.examples.append("".join(traceback.format_exception(exc))[-1500:])

    def merge(self, other: Tally) -> None:
        for k in ("tried", "files", "clean", "crashes", "ref_frames", "kept"):
            setattr(self, k, getattr(self, k) + getattr(other, k))
        self.examples += other.examples[: 3 - len(self.examples)]

    @property
    def lost(self) -> int:
        return self.ref_frames - self.kept


# ------------------------------------------------------------------------ damage
def damage_bytes(rng: random.Random, unit: bytes, *, keep_newline: bool = True) -> bytes:
    """One unit changed in one random way (never left equal)."""
    body, nl = (unit[:-1], unit[-1:]) if keep_newline and unit.endswith(b"\n") else (unit, b"")
    for _ in range(10):
        k = rng.randrange(9)
        n = len(body)
        j = rng.randrange(n + 1)
        if k == 0 and n:  # flip bits of one byte
            out = body[:j % n] + bytes([body[j % n] ^ rng.randrange(1, 256)]) + body[j % n + 1:]
        elif k == 1:  # cut
            out = body[:j]
        elif k == 2:  # insert garbage
            out = body[:j] + rng.choice(_GARBAGE) + body[j:]
        elif k == 3 and n:  # delete a span
            out = body[:j] + body[j + rng.randrange(1, 8):]
        elif k == 4:  # random bytes
            out = bytes(rng.randrange(256) for _ in range(rng.randrange(1, 40)))
        elif k == 5:  # zeroed
            out = bytes(n)
        elif k == 6 and n:  # a character replaced by a printable one
            out = body[:j % n] + bytes([rng.randrange(32, 127)]) + body[j % n + 1:]
        elif k == 7:  # blank
            out = b" " * rng.randrange(3)
        else:  # duplicated tail
            out = body + body[j:]
        if out != body:
            return out + nl
    return body + b"\x01" + nl


def _pick(rng: random.Random, n: int, share: float) -> set[int]:
    return {i for i in range(n) if rng.random() < share}


# ------------------------------------------------------------------------ CAN logs
def random_messages(rng: random.Random, n: int) -> list[can.Message]:
    t = 1.7e9 + rng.random() * 1e8
    out = []
    for _ in range(n):
        t += rng.expovariate(2000.0)
        ext = rng.random() < 0.1
        dlc = rng.randrange(9)
        out.append(can.Message(timestamp=round(t, 6), arbitration_id=rng.randrange(
            1 << 29 if ext else 1 << 11), is_extended_id=ext, dlc=dlc,
            data=bytes(rng.randrange(256) for _ in range(dlc))))
    return out


def _key(ts: float, cid: int, dlc: int, data: bytes) -> tuple:
    return (round(ts, 6) if math.isfinite(ts) else str(ts), int(cid), int(dlc), bytes(data))


def python_can_frames(path: Path, fmt: str, *, ordered: bool = False):
    """python-can's own reading of ``path``: a Counter of frames (or the list, in order)."""
    kw = {"relative_timestamp": False} if fmt == "asc" else {}
    keys = [_key(m.timestamp, m.arbitration_id, m.dlc, m.data)
            for m in can.LogReader(str(path), **kw)]
    return keys if ordered else Counter(keys)


def source_frames(path: Path, fmt: str) -> Counter:
    src = CandumpFastSource(path) if fmt == "candump-fast" else LogFileSource(path)
    try:
        b = concat(list(src.batches()))
    finally:
        src.close()
    out: Counter = Counter()
    for i in range(len(b)):
        n = int(b.dlc[i]) if b.is_fd[i] else min(int(b.dlc[i]), 8)
        out[_key(float(b.ts[i]), b.can_id[i], b.dlc[i], b.data[i, :n].tobytes())] += 1
    return out


def _frame_lines(lines: list[bytes], fmt: str) -> list[int]:
    if fmt in ("candump-fast", "candump-python-can"):
        return list(range(len(lines)))
    if fmt == "csv":
        return list(range(1, len(lines)))
    if fmt == "trc":
        return [i for i, ln in enumerate(lines) if ln.strip() and not ln.startswith(b";")]
    return [i for i, ln in enumerate(lines) if b" Rx " in ln or b" Tx " in ln]  # asc


@dataclass
class CanBase:
    """A clean log written once by python-can, and python-can's frame for each of its units
    (frame lines of a text log, objects of a BLF): the reference for every damaged copy."""

    fmt: str
    units: list[bytes]  # lines (text) or whole file split at objects (BLF: prefix + objects)
    frame_units: list[int]  # which units hold one frame each
    keys: list[tuple]  # python-can's frame of each frame unit

    @classmethod
    def make(cls, rng: random.Random, fmt: str, workdir: Path, n: int) -> CanBase:
        msgs = random_messages(rng, min(n, 2000) if fmt == "blf" else n)
        path = workdir / f"base{_SUFFIX[fmt]}"
        kw = {"compression_level": 0} if fmt == "blf" else {}
        with can.Logger(str(path), **kw) as w:
            for m in msgs:
                w.on_message_received(m)
        raw = path.read_bytes()
        if fmt == "blf":
            objs = _blf_objects(raw)
            cuts = [0] + [a for a, _ in objs] + [objs[-1][1]]
            units = [raw[x:y] for x, y in zip(cuts[:-1], cuts[1:], strict=True)]
            units.append(raw[objs[-1][1]:])
            frame_units = list(range(1, len(objs) + 1))
        else:
            units = raw.splitlines(keepends=True)
            frame_units = _frame_lines(units, fmt)
        ref = python_can_frames(path, fmt, ordered=True)
        assert len(ref) == len(frame_units), (fmt, len(ref), len(frame_units))
        return cls(fmt, units, frame_units, ref)


def can_round(rng: random.Random, base: CanBase, workdir: Path, share: float) -> Tally:
    """One damaged copy of ``base`` against python-can's frames of its undamaged units."""
    tally = Tally(files=1)
    picked = _pick(rng, len(base.frame_units), share)
    bad = {base.frame_units[i] for i in picked}
    tally.tried = len(bad)
    out = []
    for i, u in enumerate(base.units):
        if i not in bad:
            out.append(u)
        elif base.fmt == "blf":
            if rng.random() < 0.3:  # a zeroed block (what a bad sector leaves)
                out.append(bytes(len(u)))
            else:
                out.append(damage_bytes(rng, u, keep_newline=False)[: len(u)].ljust(
                    len(u), b"\x00"))
        else:
            out.append(damage_bytes(rng, u))
    dpath = workdir / f"damaged{_SUFFIX[base.fmt]}"
    dpath.write_bytes(b"".join(out))
    ref = Counter(k for i, k in enumerate(base.keys) if i not in picked)
    _compare(tally, ref, lambda: source_frames(dpath, base.fmt))
    return tally


def _compare(tally: Tally, ref: Counter, read) -> None:
    tally.ref_frames = sum(ref.values())
    try:
        got = read()
    except CrankbeatError as exc:
        tally.clean += 1
        if "\n" in str(exc):
            tally.add_crash(exc)
        return
    except Exception as exc:  # noqa: BLE001 - a crash is what is being counted
        tally.add_crash(exc)
        return
    tally.clean += 1
    tally.kept = sum(min(c, got[k]) for k, c in ref.items())
    if tally.lost and len(tally.examples) < 3:
        missing = [k for k, c in ref.items() if got[k] < c][:2]
        tally.examples.append(f"lost {tally.lost} frames, e.g. {missing}")


# ------------------------------------------------------------------------ BLF
def _blf_objects(raw: bytes) -> list[tuple[int, int]]:
    """(start, end) of every inner object of an uncompressed one-container BLF."""
    out = []
    at = raw.find(b"LOBJ")
    _, hsize, _, csize, _ = struct.unpack_from("<4sHHII", raw, at)
    pos, end = at + 32, at + csize  # base header 16 + container header 16
    while pos + 16 <= end:
        if raw[pos:pos + 4] != b"LOBJ":
            pos += 1
            continue
        size = struct.unpack_from("<I", raw, pos + 8)[0]
        out.append((pos, pos + size))
        pos += size
    return out


# ------------------------------------------------------------------------ capture files
def damaged_capture(rng: random.Random, n: int, share: float
                    ) -> tuple[bytes, list[tuple[float, bytes]], set[int]]:
    """A capture file of ``n`` random records with a ``share`` of damaged headers: (file
    bytes, records as written, indices of the damaged ones)."""
    t = 1.7e9 + rng.random() * 1e8
    recs = []
    for _ in range(n):
        t += 0.002 + rng.random() * 0.01
        recs.append((t, rng.randbytes(rng.randrange(1, 48))))
    bad = _pick(rng, n, share)
    out = bytearray(MAGIC)
    for i, (t, d) in enumerate(recs):
        head = bytearray(struct.pack("<dI", t, len(d)))
        if i in bad:
            k = rng.randrange(4)
            if k == 0:
                head[:8] = struct.pack("<d", rng.choice([math.inf, -math.inf, math.nan, 1e300,
                                                         -t, t * 1e6, 0.0]))
            elif k == 1:
                head[8:] = struct.pack("<I", rng.choice([0xFFFFFFFF, len(d) + rng.randrange(
                    1, 40), max(len(d) - rng.randrange(1, 10), 0), 1 << 25]))
            elif k == 2:
                j = rng.randrange(12)
                head[j] ^= rng.randrange(1, 256)
            else:
                head[:] = bytes(12)
        out += head + d
    if rng.random() < 0.2:  # cut inside the last record, as a power loss would
        out = out[: len(out) - rng.randrange(1, len(recs[-1][1]) + 12)]
        bad.add(n - 1)
    return bytes(out), recs, bad


def capture_round(rng: random.Random, workdir: Path, n: int, share: float) -> Tally:
    """One damaged capture file against its undamaged records."""
    tally = Tally(files=1)
    out, recs, bad = damaged_capture(rng, n, share)
    tally.tried = len(bad)
    path = workdir / "damaged.acraw"
    path.write_bytes(bytes(out))
    ref = [r for i, r in enumerate(recs) if i not in bad]
    tally.ref_frames = len(ref)

    def read() -> list:
        with CaptureReader(path) as r:
            return list(r)
    try:
        got = read()
    except CrankbeatError:
        tally.clean += 1
        return tally
    except Exception as exc:  # noqa: BLE001 - a crash is what is being counted
        tally.add_crash(exc)
        return tally
    tally.clean += 1
    exact = set(got)
    merged = b"".join(d for _, d in got)
    tally.kept = sum(1 for r in ref if r in exact or r[1] in merged)
    if tally.lost and len(tally.examples) < 3:
        tally.examples.append(f"capture: lost {tally.lost} of {len(ref)} records")
    return tally


# ------------------------------------------------------------------------ serial frames
def serial_round(rng: random.Random, n: int, share: float) -> Tally:
    """Damaged frames in a serial byte stream against the undamaged frames."""
    tally = Tally(files=1)
    sensor = load_rig("larch").sensor("bar_left")
    nrng = np.random.default_rng(rng.randrange(1 << 30))
    seq = np.arange(n)
    ticks = np.round((5.0 + seq / sensor.sample_rate_hz) / sensor.device_time_unit_s)
    acc = nrng.integers(-8000, 8000, size=(n, 3))
    raw = encode_frames(sensor, seq, ticks.astype(np.int64), acc)
    L = sensor.frame_length
    bad = _pick(rng, n, share)
    parts = [damage_bytes(rng, raw[i * L:(i + 1) * L], keep_newline=False) if i in bad
             else raw[i * L:(i + 1) * L] for i in range(n)]
    stream = b"".join(parts)
    tally.tried = len(bad)
    good = [i for i in range(n) if i not in bad]
    tally.ref_frames = len(good)
    try:
        parser = SerialFrameParser(sensor)
        recs, at, t = [], 0, 1.7e9
        while at < len(stream):
            k = rng.randrange(1, 200)
            t += 0.005
            recs.append((t, stream[at:at + k]))
            at += k
        frames = parser.push_records(recs)
    except CrankbeatError:
        tally.clean += 1
        return tally
    except Exception as exc:  # noqa: BLE001 - a crash is what is being counted
        tally.add_crash(exc)
        return tally
    tally.clean += 1
    got = Counter(map(bytes, np.round(frames.accel * 2048).astype(np.int64)))
    want = Counter(bytes(a) for a in acc[good].astype(np.int64))
    tally.kept = sum(min(c, got[k]) for k, c in want.items())
    return tally


# ------------------------------------------------------------------------ rig files
_VALUES = ["nan", "inf", "-inf", "0", "-1", "1e308", "100000", "1e12", "0.0", '"x"', "[]",
           "true", "-0.0", "4294967296", "1e-320", "0x7FF"]


def rig_round(rng: random.Random, workdir: Path, text: str) -> Tally:
    tally = Tally(files=1, tried=1)
    lines = text.splitlines()
    nums = [i for i, ln in enumerate(lines) if "=" in ln and not ln.lstrip().startswith("#")]
    i = rng.choice(nums)
    k = rng.randrange(3)
    if k == 0:
        key = lines[i].split("=")[0]
        lines[i] = f"{key}= {rng.choice(_VALUES)}"
    elif k == 1:
        del lines[i]
    else:
        lines[i] = damage_bytes(rng, lines[i].encode(), keep_newline=False).decode(
            "utf-8", "replace")
    path = workdir / "fuzz.toml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    try:
        load_rig(path)
    except CrankbeatError as exc:
        if not str(exc).startswith(str(path)):
            tally.add_crash(exc)
            return tally
    except Exception as exc:  # noqa: BLE001 - a crash is what is being counted
        tally.add_crash(exc)
        return tally
    tally.clean += 1
    return tally


def run_round(fmt: str, rng: random.Random, workdir: Path, n: int, share: float,
              rig_text: str = "", bases: dict | None = None) -> Tally:
    """One round of ``fmt``: ``n`` units, ``share`` of them damaged. CAN logs reuse the clean
    base kept in ``bases`` (made on first use)."""
    if fmt in _SUFFIX:
        bases = {} if bases is None else bases
        if fmt not in bases:
            bases[fmt] = CanBase.make(rng, fmt, workdir, n)
        return can_round(rng, bases[fmt], workdir, share)
    if fmt == "acraw":
        return capture_round(rng, workdir, n, share)
    if fmt == "serial-frames":
        return serial_round(rng, n, share)
    return rig_round(rng, workdir, rig_text)


__all__ = ["FORMATS", "CanBase", "Tally", "damage_bytes", "run_round"]
