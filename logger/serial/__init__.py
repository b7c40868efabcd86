"""Serial accelerometer boards: checksums, frame layouts, capture files, parsing, ports.

The public surface is re-exported here; the modules are one concern each.
"""

from logger.serial.capture import MAGIC, CaptureReader, CaptureWriter
from logger.serial.checksums import CHECKSUM_FUNCTIONS, crc16_ccitt_false, sum8, xor8
from logger.serial.decoder import SerialDecoder, SerialHealth
from logger.serial.frames import FrameLayout, encode_frames
from logger.serial.parser import FrameCounts, ParsedFrames, SerialFrameParser, parse_stream
from logger.serial.port import PortReader

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
