"""Rig files: load and check a rig (TOML file or shipped preset), engine layouts, live config.

Public surface::

    load_rig(spec) -> Rig              list_presets() -> list[str]
    load_layout(name) -> Engine        list_layouts() -> list[str]
    resolve_can_bus(rig, ...) -> CanBus
    resolve_serial_port(sensor, ...) -> str
"""

from crankbeat.logger.rig.config import resolve_can_bus, resolve_serial_port, serial_port_env
from crankbeat.logger.rig.layouts import list_layouts, load_layout
from crankbeat.logger.rig.loader import list_presets, load_rig, parse_rig
from crankbeat.logger.rig.model import (
    CanBus,
    CanMessage,
    CanSignal,
    Checksum,
    Limits,
    Rig,
    SerialField,
    SerialSensor,
)
from crankbeat.logger.rig.validate import element_bits, occupied_bits

__all__ = [
    "CanBus", "CanMessage", "CanSignal", "Checksum", "Limits", "Rig", "SerialField",
    "SerialSensor", "element_bits", "list_layouts", "list_presets", "load_layout",
    "load_rig", "occupied_bits", "parse_rig", "resolve_can_bus", "resolve_serial_port",
    "serial_port_env",
]
