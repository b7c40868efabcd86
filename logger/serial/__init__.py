"""Serial accelerometer boards: checksums, frame layouts, capture files, parsing, ports.

The public surface is re-exported here; the modules are one concern each.
"""

from logger.serial.capture import MAGIC, CaptureReader, CaptureWriter
from logger.serial.checksums import CHECKSUM_FUNCTIONS, crc16_ccitt_false, sum8, xor8
from logger.serial.frames import FrameLayout, encode_frames

__all__ = [
    "CHECKSUM_FUNCTIONS",
    "MAGIC",
    "CaptureReader",
    "CaptureWriter",
    "FrameLayout",
    "crc16_ccitt_false",
    "encode_frames",
    "sum8",
    "xor8",
]
