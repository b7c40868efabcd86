"""Serial accelerometer boards: checksums, frame layouts, capture files, parsing, ports.

The flow is ``PortReader`` (live) or ``CaptureReader`` (replay) -> records
``(host_time, bytes)`` -> ``SerialDecoder.push(records)`` -> ``AccelBlock`` on the CAN time base.
Conventions shared by every module here:

- host times are ``time.time()`` seconds, the clock python-can stamps live CAN frames with;
- a zero-length record marks a break in the link (adapter pulled, queue overflow): bytes on
  its two sides are never joined into one frame; capture files keep these markers;
- a frame's sync bytes sit at offset 0; fields, checksum kind and range come from the rig.

The public surface is re-exported here; the modules are one concern each.
"""

from crankbeat.logger.serial.capture import MAGIC, CaptureReader, CaptureWriter
from crankbeat.logger.serial.checksums import CHECKSUM_FUNCTIONS, crc16_ccitt_false, sum8, xor8
from crankbeat.logger.serial.decoder import SerialDecoder, SerialHealth
from crankbeat.logger.serial.frames import FrameLayout, encode_frames
from crankbeat.logger.serial.parser import (
    FrameCounts,
    ParsedFrames,
    SerialFrameParser,
    parse_stream,
)
from crankbeat.logger.serial.port import PortReader

__all__ = [
    "CHECKSUM_FUNCTIONS",
    "MAGIC",
    "CaptureReader",
    "CaptureWriter",
    "FrameCounts",
    "FrameLayout",
    "ParsedFrames",
    "PortReader",
    "SerialDecoder",
    "SerialFrameParser",
    "SerialHealth",
    "crc16_ccitt_false",
    "encode_frames",
    "parse_stream",
    "sum8",
    "xor8",
]
