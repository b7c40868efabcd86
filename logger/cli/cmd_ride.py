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
    desk = parser.add_argument_group(
        "desk rehearsal (no bike: a ride is played through the live path at its own pace)")
    desk.add_argument("--rehearse", metavar="CAN_LOG|sim",
                      help="play this recorded ride (its captures beside it are served as the "
                           "serial ports), or 'sim' for a simulated ride of the rig")
    desk.add_argument("--rehearse-scenario", metavar="FILE",
                      help="with --rehearse sim: the simulator scenario (default: a quick one)")
    desk.add_argument("--rehearse-for", type=float, metavar="SECONDS",
                      help="end the rehearsal after this many seconds of the played ride")
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


def _simulated_ride(args: argparse.Namespace, out: Path) -> Path:
    """A simulated ride of the rig, written into ``out``: its CAN log."""
    from crankbeat.logger.cli.main import main

    synth = ["synth", "--rig", args.rig, "--out", str(out), "--quiet"]
    if args.rehearse_scenario:
        synth += ["--scenario", args.rehearse_scenario]
    else:
        seconds = args.rehearse_for + 1.0 if args.rehearse_for else 120.0
        synth += ["--duration", f"{seconds:g}", "--rpm", "3000:7000", "--throttle", "30"]
    if main(synth) != 0:
        raise UsageError("--rehearse sim: the simulator could not make the ride (see above)")
    return out / "ride.log"


def run(args: argparse.Namespace) -> int:
    if args.rehearse:
        return _rehearse(args)
    from crankbeat.logger.rig import load_rig, resolve_can_bus

    rig = load_rig(args.rig)
    bus = resolve_can_bus(rig, interface=args.interface, channel=args.channel,
                          bitrate=args.bitrate)
    ports = ports_for(rig, args.port)
    return _ride(args, rig, bus, ports, threading.Event())


def _rehearse(args: argparse.Namespace) -> int:
    import tempfile

    from crankbeat.logger.live.rehearsal import Rehearsal
    from crankbeat.logger.rig import load_rig

    if args.interface or args.channel or args.port:
        raise UsageError("--rehearse plays its own bus and ports: leave out --interface, "
                         "--channel and --port")
    rig = load_rig(args.rig)
    with tempfile.TemporaryDirectory(prefix="crankbeat-rehearsal-") as tmp:
        log = (_simulated_ride(args, Path(tmp)) if args.rehearse == "sim"
               else Path(args.rehearse))
        stop = threading.Event()
        with Rehearsal(rig, log, stop, seconds=args.rehearse_for) as desk:
            stderr(f"REHEARSAL: playing {log.name} at its own pace through the live path "
                   "(no bike is connected; Ctrl-C ends it early)")
            code = _ride(args, rig, desk.bus, desk.ports, stop)
        if desk.error is not None:
            stderr(f"rehearsal: playing the ride failed ({desk.error})")
        return code


def _ride(args: argparse.Namespace, rig, bus, ports: dict[str, str],
          stop: threading.Event) -> int:
    record_dir = Path(args.record) if args.record else None
    if record_dir is not None:
        try:
            record_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UsageError(f"--record {record_dir}: cannot create it ({exc.strerror})") from None
    from crankbeat.logger.live.ride import ride  # imported here: it pulls in every dsp stage


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
