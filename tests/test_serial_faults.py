"""Damaged accelerometer captures: what is valid is kept, counters stay bounded, clock steps
are taken out.

The shipped demo capture (simulated board, 2 kHz) is damaged one way at a time and decoded
with the capture reader and the serial decoder; the aligned sample times of the undamaged file
are the reference. Before: a record time of ``inf`` crashed the analysis (exit 70), one bad
record length dropped half the samples, bad record times made the lost-frame counter 3.5e12 or
-9.2e18, and a +30 s host clock step masked 1381 of 2921 events.
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger.rig import load_rig
from crankbeat.logger.serial.capture import MAGIC, CaptureReader
from crankbeat.logger.serial.decoder import SerialDecoder

CAPTURE = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "demo.bar_left.acraw"


def _records() -> list[tuple[float, bytes]]:
    raw = CAPTURE.read_bytes()
    out, off = [], len(MAGIC)
    while off < len(raw) and len(out) < 2500:  # the first ~20 s
        t, n = struct.unpack_from("<dI", raw, off)
        out.append((t, raw[off + 12 : off + 12 + n]))
        off += 12 + n
    return out


RECS = _records()
N = len(RECS)


def _write(path: Path, recs, lengths: dict[int, int] | None = None) -> Path:
    b = bytearray(MAGIC)
    for k, (t, d) in enumerate(recs):
        b += struct.pack("<dI", t, (lengths or {}).get(k, len(d))) + d
    path.write_bytes(bytes(b))
    return path


def _decode(path: Path):
    sensor = load_rig("larch").sensor("bar_left")
    dec = SerialDecoder(sensor)
    with CaptureReader(path) as r:
        blocks = [dec.push(r.read(200)) for _ in range(N // 200 + 2)]
        blocks.append(dec.flush())
        reader = (r.bad_records, r.bytes_lost)
    t = np.concatenate([b.t for b in blocks])
    return t, dec.health, reader, dec.notes


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    return _decode(_write(tmp_path_factory.mktemp("c") / "c.acraw", RECS))


def _same_samples(t, t0, *, missing=0):
    assert len(t0) - missing <= len(t) <= len(t0)
    common = np.intersect1d(np.round(t, 4), np.round(t0, 4))
    assert len(common) >= len(t0) - missing - 5


CASES = {
    "record time inf": (lambda: ([(float("inf"), d) if k == N // 3 else (t, d)
                                  for k, (t, d) in enumerate(RECS)], None), 0),
    "record time a million times too large": (lambda: (
        [(t * 1e6, d) if k in (N // 4, N // 2) else (t, d) for k, (t, d) in enumerate(RECS)],
        None), 0),
    "record time negated": (lambda: ([(-t, d) if k == N // 4 else (t, d)
                                      for k, (t, d) in enumerate(RECS)], None), 0),
    "record length far too large": (lambda: (RECS, {N // 2: 0xFFFFFF}), 0),
    "record length 7 too large": (lambda: (RECS, {N // 2: len(RECS[N // 2][1]) + 7}), 40),
    "record length 5 too small": (lambda: (RECS, {N // 2: len(RECS[N // 2][1]) - 5}), 40),
}


@pytest.mark.parametrize("case", list(CASES))
def test_damaged_record_keeps_the_rest(tmp_path, clean, case):
    make, missing = CASES[case]
    recs, lengths = make()
    t, health, (bad, _), notes = _decode(_write(tmp_path / "d.acraw", recs, lengths))
    t0, h0, _, _ = clean
    assert bad >= 1 and notes
    _same_samples(t, t0, missing=missing)
    assert 0 <= health.lost <= h0.lost + missing  # bounded, never billions
    assert np.all(np.isfinite(t)) and np.all(np.diff(t) > -0.05)


@pytest.mark.parametrize("step", [30.0, -30.0, 5.0])
def test_host_clock_step_is_found_counted_and_taken_out(tmp_path, clean, step):
    recs = [(t + (step if k >= N // 2 else 0.0), d) for k, (t, d) in enumerate(RECS)]
    t, health, _, notes = _decode(_write(tmp_path / "s.acraw", recs))
    t0, h0, _, _ = clean
    assert health.host_steps == 1 and health.lost == h0.lost
    assert any("host clock stepped" in n for n in notes)
    assert len(t) == len(t0)
    assert np.max(np.abs(t - t0)) < 0.02  # every sample where it was, within 20 ms
