"""Play a recorded ride as if a bike were connected, to practise `crankbeat ride` without hardware.

The CAN frames go onto a python-can bus that another process can join (udp_multicast by default;
socketcan's vcan also works), and each accelerometer capture is served on a local TCP port that
pyserial opens as ``socket://localhost:PORT``. Both are paced to the recording's own timestamps.

    terminal 1:  .venv/bin/python scripts/practice_live.py              # the demo ride, looping
    terminal 2:  .venv/bin/crankbeat ride --rig larch --interface udp_multicast \\
                     --channel 239.74.163.2 --port bar_left=socket://localhost:47011 \\
                     --store practice.db

Ctrl-C stops either side. Nothing here is needed on a real bike.
"""

from __future__ import annotations

import argparse
import socket
import sys
import threading
import time
from pathlib import Path

import can

from crankbeat.logger.serial.capture import CaptureReader

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"


def serve_capture(path: Path, port: int, t0_ride: float, t0_wall: float,
                  stop: threading.Event) -> None:
    """Serve the capture's bytes to one client at a time, at the pace they were recorded."""
    with socket.create_server(("127.0.0.1", port)) as server:
        server.settimeout(0.5)
        while not stop.is_set():
            try:
                conn, _ = server.accept()
            except TimeoutError:
                continue
            with conn:
                pending = bytearray()
                for host_t, data in CaptureReader(path).read():
                    if stop.is_set():
                        return
                    wait = (host_t - t0_ride) - (time.monotonic() - t0_wall)
                    if wait > 0.01:  # send what is due in one go: per-read calls lag behind
                        try:
                            conn.sendall(pending)
                        except OSError:
                            break  # the rider stopped the ride: wait for the next one
                        pending.clear()
                        time.sleep(wait)
                    pending += data


def play_can(path: Path, bus: can.BusABC, t0_ride: float, t0_wall: float,
             stop: threading.Event) -> int:
    sent = 0
    for msg in can.LogReader(str(path)):
        if stop.is_set():
            break
        wait = (msg.timestamp - t0_ride) - (time.monotonic() - t0_wall)
        if wait > 0:
            time.sleep(wait)
        bus.send(msg)
        sent += 1
    return sent


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--can", default=str(DEMO / "demo.log"), help="CAN log to play")
    p.add_argument("--accel", action="append", default=[], metavar="CAPTURE=PORT",
                   help="capture file and the TCP port to serve it on (default: the demo's "
                        "bar_left capture on 47011)")
    p.add_argument("--interface", default="udp_multicast", help="python-can interface")
    p.add_argument("--channel", default="239.74.163.2", help="channel of that interface")
    p.add_argument("--once", action="store_true", help="play the ride once instead of looping")
    args = p.parse_args(argv)
    accel = [a.rsplit("=", 1) for a in args.accel] or [
        (str(DEMO / "demo.bar_left.acraw"), "47011")]
    first = next(iter(can.LogReader(args.can)))
    stop = threading.Event()
    with can.Bus(interface=args.interface, channel=args.channel) as bus:
        print(f"playing {args.can} on {args.interface} {args.channel}; captures on "
              + ", ".join(f"socket://localhost:{port}" for _, port in accel)
              + " (Ctrl-C stops)", file=sys.stderr)
        try:
            while True:
                t0_wall = time.monotonic()
                servers = [threading.Thread(target=serve_capture, daemon=True,
                                            args=(Path(path), int(port), first.timestamp,
                                                  t0_wall, stop)) for path, port in accel]
                for s in servers:
                    s.start()
                sent = play_can(Path(args.can), bus, first.timestamp, t0_wall, stop)
                print(f"ride played: {sent} CAN frames", file=sys.stderr)
                stop.set()
                for s in servers:
                    s.join()
                if args.once:
                    return 0
                stop.clear()
        except KeyboardInterrupt:
            stop.set()
            return 0


if __name__ == "__main__":
    sys.exit(main())
