"""CAN acquisition: bit layouts, frame decoding and the sources (log files, live buses).

Public surface: :func:`decode_signal`, :func:`decode_raw`, :func:`encode_signal`,
:func:`signal_bits` (bit layouts); :class:`FrameDecoder` (frames -> teeth and status blocks);
:func:`open_log`, :class:`BusSource`, :class:`CanSource`, :class:`FrameBatch` (sources).
"""

from crankbeat.logger.can.bits import decode_raw, decode_signal, encode_signal, signal_bits
from crankbeat.logger.can.decode import FrameDecoder
from crankbeat.logger.can.sources import BusSource, CanSource, FrameBatch, open_log

__all__ = ["BusSource", "CanSource", "FrameBatch", "FrameDecoder", "decode_raw",
           "decode_signal", "encode_signal", "open_log", "signal_bits"]
