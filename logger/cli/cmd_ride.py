"""``crankbeat ride``: live acquisition and analysis on the bike."""

from __future__ import annotations

import argparse
import threading
from pathlib import Path

from crankbeat.errors import UsageError
from crankbeat.logger.cli.common import add_store_argument, open_store, parse_assignment, stderr
from crankbeat.logger.cli.summary import render_run
from crankbeat.logger.live import LiveDisplay, caution_text
from crankbeat.logger.stop_signals import stop_on_signals

NAME = "ride"
HELP = "record and analyse a ride live from the CAN bus and the accelerometer ports"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--rig", required=True, help="rig file (TOML) or preset name, e.g. larch")
    add_store_argument(parser)
    parser.add_argument("--interface", help="python-can interface (default: from the rig)")
    parser.add_argument("--channel", help="CAN channel, e.g. can0 (default: from the rig)")
    parser.add_argument("--bitrate", type=int, help="CAN bit rate, bit/s (default: from the rig)")
    parser.add_argument("--port", action="append", default=[], metavar="NAME=URL",
                        help="serial port of sensor NAME (device or pyserial URL); repeatable")
    parser.add_argument("--record", metavar="DIR",
                        help="also record the raw CAN log and captures into DIR")
    parser.add_argument("--label", help="a short name for the run")
    parser.add_argument("--notes", help="rider notes")
    parser.add_argument("--odometer", type=float, metavar="KM", help="odometer reading, km")
    parser.add_argument("--plain", action="store_true",
                        help="print updates line by line instead of redrawing the screen")
    parser.epilog = ("example: crankbeat ride --rig larch --channel can0 "
                     "--port bar_left=/dev/ttyUSB0 --record rides/ --label morning\n"
                     "Ctrl-C (or SIGTERM, SIGHUP) ends the ride and keeps everything recorded "
                     "so far.\n\n"
                     + caution_text())


def ports_for(rig, specs: list[str]) -> dict[str, str]:
    """Serial port per sensor: ``--port`` flags, then environment, then the rig file."""
    from crankbeat.logger.rig import resolve_serial_port

    given: dict[str, str] = {}
    names = [s.name for s in rig.sensors]
    for spec in specs:
        name, url = parse_assignment(spec, "--port")
        if name not in names:
            raise UsageError(f"--port {spec}: rig '{rig.name}' has no sensor '{name}' "
                             f"(sensors: {', '.join(names) or 'none'})")
        given[name] = url
    return {s.name: resolve_serial_port(s, port=given.get(s.name)) for s in rig.sensors}


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.rig import load_rig, resolve_can_bus

    rig = load_rig(args.rig)
    bus = resolve_can_bus(rig, interface=args.interface, channel=args.channel,
                          bitrate=args.bitrate)
    ports = ports_for(rig, args.port)
    record_dir = Path(args.record) if args.record else None
    if record_dir is not None:
        try:
            record_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UsageError(f"--record {record_dir}: cannot create it ({exc.strerror})") from None
    from crankbeat.logger.live.ride import ride  # imported here: it pulls in every dsp stage

    stop = threading.Event()

    def _stopping(name: str) -> None:
        again = " (Ctrl-C again to abort at once)" if name == "SIGINT" else f" ({name})"
        stderr(f"stopping the ride{again}")

    with stop_on_signals(stop, _stopping) as seen:
        with open_store(args, create=True) as store:
            display = LiveDisplay(alert_pct=rig.limits.misfire_alert_pct, live=not args.plain)
            with display:
                result = ride(
                    rig, bus, ports, store, record_dir=record_dir, display=display,
                    stop_event=stop, label=args.label, notes=args.notes,
                    odometer_km=args.odometer, say=stderr,
                    stopped_by=lambda: seen["signal"] if seen["signal"] != "SIGINT" else None,
                )
            print(render_run(store, int(result.run_id)))
    return 0
