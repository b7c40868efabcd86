"""Where the live bus and ports are: command-line flags, then environment, then the rig file."""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import replace

from crankbeat.errors import RigError
from crankbeat.logger.rig.model import CanBus, Rig, SerialSensor

__all__ = ["resolve_can_bus", "resolve_serial_port", "serial_port_env"]

ENV_INTERFACE = "CRANKBEAT_CAN_INTERFACE"
ENV_CHANNEL = "CRANKBEAT_CAN_CHANNEL"
ENV_BITRATE = "CRANKBEAT_CAN_BITRATE"


def resolve_can_bus(
    rig: Rig,
    *,
    interface: str | None = None,
    channel: str | None = None,
    bitrate: int | None = None,
    env: Mapping[str, str] = os.environ,
) -> CanBus:
    """The CAN bus to open, each setting taken from the first place that gives it.

    Order, per setting: (1) the keyword argument (a command-line flag), (2) the environment
    variables ``CRANKBEAT_CAN_INTERFACE``, ``CRANKBEAT_CAN_CHANNEL``, ``CRANKBEAT_CAN_BITRATE``
    (empty means unset), (3) the rig file's ``[can]`` table. ``fd`` always comes from the rig.

    Raises
    ------
    RigError
        A bitrate from the environment that is not a positive integer, or a flag bitrate <= 0.
    """
    bus = rig.can_bus
    iface = interface or env.get(ENV_INTERFACE) or bus.interface
    chan = channel or env.get(ENV_CHANNEL) or bus.channel
    if bitrate is not None:
        if isinstance(bitrate, bool) or not isinstance(bitrate, int) or bitrate <= 0:
            raise RigError(f"bitrate flag: got {bitrate!r}, expected a positive integer bit/s")
        rate = bitrate
    elif env.get(ENV_BITRATE):
        text = env[ENV_BITRATE]
        try:
            rate = int(text)
        except ValueError:
            rate = 0
        if rate <= 0:
            raise RigError(f"environment {ENV_BITRATE}: got {text!r}, expected a positive "
                           "integer bit/s such as 1000000")
    else:
        rate = bus.bitrate
    return replace(bus, interface=iface, channel=chan, bitrate=rate)


def serial_port_env(sensor: SerialSensor) -> str:
    """Environment variable naming a sensor's port: ``CRANKBEAT_SERIAL_<NAME UPPER>``."""
    return f"CRANKBEAT_SERIAL_{sensor.name.upper()}"


def resolve_serial_port(
    sensor: SerialSensor, *, port: str | None = None, env: Mapping[str, str] = os.environ
) -> str:
    """The serial port (a device path or a pyserial URL) of one sensor.

    Order: (1) ``port`` (a command-line flag), (2) the environment variable
    ``CRANKBEAT_SERIAL_<SENSOR NAME UPPER>`` (e.g. ``CRANKBEAT_SERIAL_BAR_LEFT``; empty means
    unset), (3) the rig file's ``port``.

    Raises
    ------
    RigError
        None of the three gives a port.
    """
    var = serial_port_env(sensor)
    found = port or env.get(var) or sensor.port
    if not found:
        raise RigError(f"serial sensor {sensor.name!r}: no port given, expected a --port flag, "
                       f"{var} in the environment or 'port' in the rig file")
    return found
