"""Frames per second of the serial frame parser on the reference board's stream.

Usage: python scripts/bench_serial_parser.py [seconds_of_stream] [read_bytes]
Makes a 2 kHz stream of 16-byte frames with a little damage, cuts it into port reads of
``read_bytes`` and times (a) one push per read, (b) push_records over batches of reads,
(c) the whole decoder
(parser and clock aligner) with one read per push and in batches.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from crankbeat.logger.rig.model import Checksum, SerialField, SerialSensor
from crankbeat.logger.serial.decoder import SerialDecoder
from crankbeat.logger.serial.frames import encode_frames
from crankbeat.logger.serial.parser import SerialFrameParser

G = 1 / 2048
SENSOR = SerialSensor(
    name="bar_left", location="bar", mount="bench", axes=("forward", "left", "up"),
    port="loop://", baud=921600, sample_rate_hz=2000.0, frame_length=16, sync=b"\xa5\x5a",
    fields=(
        SerialField("sequence", 2, "u16", role="sequence"),
        SerialField("device_time", 4, "u32", role="device_time"),
        SerialField("ax", 8, "i16", scale=G, role="accel_x"),
        SerialField("ay", 10, "i16", scale=G, role="accel_y"),
        SerialField("az", 12, "i16", scale=G, role="accel_z"),
    ),
    checksum=Checksum("crc16-ccitt-false", 2, 14, 14),
)


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 600.0
    read_bytes = int(sys.argv[2]) if len(sys.argv) > 2 else 256
    n = int(seconds * 2000)
    rng = np.random.default_rng(1)
    acc = rng.integers(-4000, 4000, size=(n, 3))
    stream = bytearray(encode_frames(SENSOR, np.arange(n), np.arange(n) * 500, acc))
    for at in rng.integers(0, len(stream), size=n // 10_000):  # one byte in 10 000 frames flipped
        stream[at] ^= 0x04
    stream = bytes(stream)
    reads = [(i * 1e-3, stream[i : i + read_bytes]) for i in range(0, len(stream), read_bytes)]

    p = SerialFrameParser(SENSOR)
    t0 = time.perf_counter()
    got = sum(len(p.push(d, t)) for t, d in reads)
    dt = time.perf_counter() - t0
    print(f"{n} frames, {len(reads)} reads of {read_bytes} B")
    print(f"push per read:      {got / dt:12,.0f} frames/s  ({dt:.2f} s; "
          f"corrupt {p.counts.corrupt}, lost {p.counts.lost})")
    for batch in (64, 1024):
        p = SerialFrameParser(SENSOR)
        t0 = time.perf_counter()
        got = sum(len(p.push_records(reads[i : i + batch])) for i in range(0, len(reads), batch))
        dt = time.perf_counter() - t0
        print(f"push_records x{batch:<5}: {got / dt:12,.0f} frames/s  ({dt:.2f} s)")
    for batch in (1, 64, 1024):
        dec = SerialDecoder(SENSOR)
        t0 = time.perf_counter()
        got = sum(len(dec.push(reads[i : i + batch])) for i in range(0, len(reads), batch))
        got += len(dec.flush())
        dt = time.perf_counter() - t0
        print(f"decoder x{batch:<5}     : {got / dt:12,.0f} samples/s ({dt:.2f} s, parse + align)")


if __name__ == "__main__":
    main()
