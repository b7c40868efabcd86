"""``crankbeat synth``: simulate a ride of a rig and write its recordings and ground truth."""

from __future__ import annotations

import argparse
import sys
import time

from crankbeat.errors import UsageError

NAME = "synth"
HELP = "simulate a ride (CAN log, serial captures, ground truth) from a scenario or quick flags"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--rig", default=None,
                        help="rig file (TOML) or preset name (default: the scenario's, else larch)")
    parser.add_argument("--scenario", metavar="FILE", default=None,
                        help="scenario file (TOML); without it the quick flags below make one")
    parser.add_argument("--out", metavar="DIR", default="synth-out", help="output directory")
    parser.add_argument("--stem", default="ride", help="file name stem (default: ride)")
    parser.add_argument("--can-format", default=".log",
                        help="CAN log suffix: .log .asc .blf .csv .trc, optionally + .gz")
    quick = parser.add_argument_group("quick scenario (when no --scenario is given)")
    quick.add_argument("--duration", type=float, default=10.0, help="seconds (default 10)")
    quick.add_argument("--rpm", default="4000",
                       help="steady crank speed, or START:END for a ramp (default 4000)")
    quick.add_argument("--throttle", type=float, default=20.0, help="%% (default 20)")
    quick.add_argument("--gear", type=int, default=3, help="0 = neutral (default 3)")
    quick.add_argument("--misfire-cylinder", type=int, default=None, metavar="N",
                       help="cylinder (1-based) that misfires")
    quick.add_argument("--misfire-rate", type=float, default=0.02, metavar="P",
                       help="chance per firing event of that cylinder (default 0.02)")
    quick.add_argument("--rough", type=float, default=0.0, help="road roughness (0 smooth)")
    parser.add_argument("--seed", type=int, default=None, help="random seed (overrides the file's)")
    parser.add_argument("--quiet", action="store_true",
                        help="no progress on stderr (shown only on a terminal anyway)")
    parser.epilog = (
        "examples:\n"
        "  crankbeat synth --rig larch --duration 20 --rpm 3000:7000 --throttle 40 "
        "--misfire-cylinder 2 --out rides/pull\n"
        "  crankbeat synth --scenario fixtures/demo/demo.scenario.toml --out rides/demo"
    )


def _rpm_pair(text: str) -> tuple[float, float]:
    try:
        parts = [float(x) for x in text.split(":")]
    except ValueError:
        raise UsageError(f"--rpm {text!r}: expected a number or START:END") from None
    if len(parts) == 1:
        return parts[0], parts[0]
    if len(parts) == 2:
        return parts[0], parts[1]
    raise UsageError(f"--rpm {text!r}: expected a number or START:END")


def quick_scenario(args: argparse.Namespace):
    """The scenario the quick flags describe."""
    from crankbeat.logger.sim import Fault, Scenario, Segment

    if not args.duration > 0:
        raise UsageError(f"--duration must be > 0 s, got {args.duration}")
    faults = ()
    if args.misfire_cylinder is not None:
        faults = (Fault("misfire", args.misfire_cylinder, probability=args.misfire_rate),)
    seg = Segment(args.duration, gear=args.gear, rpm=_rpm_pair(args.rpm),
                  throttle=(args.throttle, args.throttle), rough=args.rough)
    return Scenario(segments=(seg,), faults=faults, seed=args.seed or 0, name="quick",
                    rig=args.rig)


def check_against_rig(sc, rig) -> None:
    """Faults on cylinders the engine has, speeds within its rev limit: else one clear line."""
    n_cyl = rig.engine.n_cylinders
    for fault in sc.faults:
        cyl = getattr(fault, "cylinder", None)
        if isinstance(cyl, int) and not 1 <= cyl <= n_cyl:
            raise UsageError(f"misfire cylinder {cyl}: rig '{rig.name}' has {n_cyl} cylinders "
                             f"(1..{n_cyl})")
    limit = rig.limits.rev_limit_rpm
    for i, seg in enumerate(sc.segments, start=1):
        rpm = getattr(seg, "rpm", None) or ()
        if any(r > limit for r in rpm):
            raise UsageError(f"segment {i}: {max(rpm):g} rpm is above the rev limit of rig "
                             f"'{rig.name}' ({limit:g} rpm, [limits] rev_limit_rpm)")
        if any(r <= 0 for r in rpm):
            raise UsageError(f"segment {i}: rpm must be above 0, got {min(rpm):g}")


class _Progress:
    """A one-line progress display on stderr (only when it is a terminal or asked for)."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled
        self.t0 = time.perf_counter()

    def __call__(self, stage: str, frac: float) -> None:
        if self.enabled:
            bar = "#" * int(20 * frac)
            took = time.perf_counter() - self.t0
            sys.stderr.write(f"\rsynth: {stage:<14} [{bar:<20}] {took:6.1f} s")
            sys.stderr.flush()

    def done(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")


def run(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from crankbeat.logger.rig import load_rig
    from crankbeat.logger.sim import load_scenario, simulate, write_ride

    if args.scenario:
        sc = load_scenario(args.scenario)
    else:
        sc = quick_scenario(args)
    if args.seed is not None:
        sc = replace(sc, seed=args.seed)
    rig_spec = args.rig or sc.rig or "larch"
    rig = load_rig(rig_spec)
    sc = replace(sc, rig=rig_spec)
    check_against_rig(sc, rig)
    progress = _Progress(not args.quiet and sys.stderr.isatty())
    ride = simulate(rig, sc, progress=progress)
    progress("writing", 1.0)
    paths = write_ride(ride, args.out, can_format=args.can_format, stem=args.stem)
    progress.done()
    ev = ride.events
    miss = int((~ev["fired"] & ~ev["fuel_cut"]).sum())
    print(f"simulated {sc.duration:.1f} s of rig '{rig.name}': {len(ride.tooth_time)} tooth edges, "
          f"{len(ev)} firing events, {miss} misfires, {int(ev['fuel_cut'].sum())} in fuel cut")
    for p in paths.all():
        print(f"  {p}")
    return 0
