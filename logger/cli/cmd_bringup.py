"""``crankbeat bringup``: check a rig file against a short recording of its bike."""

from __future__ import annotations

import argparse

from crankbeat.logger.cli.common import parse_assignment, print_json, table

NAME = "bringup"
HELP = "check a rig file against a short log of the bike: ids, wheel, cam, TDC; suggest values"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--rig", required=True, help="rig file (TOML) or preset name")
    parser.add_argument("--can", required=True, metavar="LOG",
                        help="CAN log of the bike (any format python-can reads)")
    parser.add_argument("--accel", action="append", default=[], metavar="SENSOR=FILE",
                        help="serial capture of a sensor of the rig (repeatable)")
    parser.add_argument("--window", type=float, default=40.0, metavar="DEG",
                        help="half-width of the TDC fit window, crank deg (default 40)")
    parser.add_argument("--search", type=float, default=20.0, metavar="DEG",
                        help="seek TDC within this of the file's value, deg (default 20)")
    parser.add_argument("--unknown", type=int, default=5, metavar="N",
                        help="unknown CAN ids to list (default 5, the busiest first)")
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    parser.epilog = (
        "example:\n  crankbeat bringup --rig newbike.toml --can first-ride.log\n\n"
        "For TDC the log needs a stretch of closed throttle above 1.5 x idle (overrun fuel cut),\n"
        "at least 20 cycles: in neutral, rev to mid revs, close the throttle and let the\n"
        "engine slow (in gear the driveline tilts the dip by about 1 deg).")


def _id(r) -> str:
    return f"0x{r.can_id:08X}" if r.extended else f"0x{r.can_id:03X}"


def run(args: argparse.Namespace) -> int:
    from crankbeat.logger.bringup import check_rig
    from crankbeat.logger.rig import load_rig

    rig = load_rig(args.rig)
    accel = dict(parse_assignment(a, "--accel") for a in args.accel)
    res = check_rig(rig, args.can, accel, window_deg=args.window, search_deg=args.search)
    if args.json:
        print_json(_as_dict(res, args.unknown))
        return 0
    print(f"rig file: {rig.source} is valid ({rig.name}: {rig.engine.name}, "
          f"{len(rig.messages)} CAN messages)")
    print(f"log: {args.can}, {res.duration_s:.1f} s")
    rows = [(_id(r), r.name, r.frames, f"{r.rate_hz:.1f}",
             "-" if r.expected_hz is None else f"{r.expected_hz:g}",
             "present" if r.frames else "MISSING") for r in res.ids]
    print("configured CAN ids:")
    print(table(("id", "message", "frames", "Hz", "file Hz", ""), rows))
    if res.unknown_ids:
        print(f"other CAN ids ({len(res.unknown_ids)}, busiest first):")
        print(table(("id", "frames", "Hz"), [(_id(r), r.frames, f"{r.rate_hz:.1f}")
                                             for r in res.unknown_ids[:args.unknown]]))
    for name, (n, hz) in res.sensors.items():
        print(f"sensor {name}: {n} samples, {hz:.1f} Hz (file: "
              f"{rig.sensor(name).sample_rate_hz:g} Hz)")
    w = res.wheel
    if w is None:
        print("wheel: no gap seen in the tooth periods")
    else:
        print(f"wheel: {w.teeth}-{w.missing} seen (gap {w.gap_ratio:.2f} x a tooth period, "
              f"{w.revolutions} revolutions, {100 * w.agreeing:.0f} % agree); file "
              f"{rig.wheel.teeth}-{rig.wheel.missing}")
    c = res.cam
    cam_seen = "" if c is None else f"{c.pattern}" + (
        f", changes at tooth {c.switch_tooth} (seen at frame ends: up to "
        f"{res.teeth_per_frame - 1} teeth late)" if c.switch_tooth is not None else "")
    print(f"cam: {cam_seen + '; ' if cam_seen else ''}{res.cam_note}; file: cam = "
          f"{rig.wheel.cam!r}, cam_active_level = {rig.wheel.cam_active_level}")
    if res.tdc is not None:
        t = res.tdc
        value = (rig.wheel.tdc_offset_deg + t.correction_deg) % 360.0
        print(f"TDC: {value:.2f} ± {t.se_deg:.2f} deg (standard error) after tooth 0 (file "
              f"{rig.wheel.tdc_offset_deg:g}; {t.cycles} cycles without firing, "
              f"{t.rpm_range[0]:.0f}-{t.rpm_range[1]:.0f} rpm, {res.tdc_stretch})")
        if res.tdc_note:
            print(f"  caution: {res.tdc_note}")
    else:
        print(res.tdc_note)
    if res.suggestions:
        print("suggested rig-file values:")
        for key, value in res.suggestions.items():
            section, k = key.split(".")
            print(f"  [{section}] {k} = {value!r}".replace("'", '"'))
    else:
        print("no changes suggested")
    return 0


def _as_dict(res, n_unknown: int) -> dict:
    def rate(r):
        return {"id": _id(r), "name": r.name, "frames": r.frames, "rate_hz": r.rate_hz,
                "file_rate_hz": r.expected_hz}

    tdc = None
    if res.tdc is not None:
        tdc = {"tdc_offset_deg": (res.rig.wheel.tdc_offset_deg + res.tdc.correction_deg) % 360,
               "se_deg": res.tdc.se_deg, "cycles": res.tdc.cycles,
               "rpm_range": list(res.tdc.rpm_range), "stretch": res.tdc_stretch,
               "caution": res.tdc_note,
               "partner_exchange": res.tdc.partner_exchange,
               "misplaced_dips": list(res.misplaced_dips)}
    return {
        "rig": res.rig.source, "duration_s": res.duration_s,
        "ids": [rate(r) for r in res.ids], "unknown_ids": [rate(r) for r in
                                                           res.unknown_ids[:n_unknown]],
        "wheel": None if res.wheel is None else vars(res.wheel),
        "cam": None if res.cam is None else vars(res.cam), "cam_note": res.cam_note,
        "tdc": tdc, "tdc_note": res.tdc_note,
        "sensors": {k: {"samples": n, "rate_hz": hz} for k, (n, hz) in res.sensors.items()},
        "suggestions": res.suggestions,
    }
