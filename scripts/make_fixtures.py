"""`make fixtures`: regenerate every simulated ride under fixtures/ bit for bit from its seed.

    python scripts/make_fixtures.py            # (re)write fixtures/
    python scripts/make_fixtures.py --check    # regenerate into a temp dir, compare hashes

What each fixture is: fixtures/README.md.
"""

from __future__ import annotations

import argparse
import hashlib
import shutil
import sys
import tempfile
from pathlib import Path

from crankbeat.logger.rig import load_rig
from crankbeat.logger.sim import (
    CanSpec,
    EngineSpec,
    Fault,
    Scenario,
    Segment,
    SerialSpec,
    WheelSpec,
    simulate,
    write_ride,
)

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
START = 1767225600.0  # 2026-01-01 00:00 UTC on the CAN time base (invented)


def demo_scenario() -> Scenario:
    """The Larch mule on the invented test loop, about a minute."""
    seg = Segment
    segments = (
        seg(10.0, gear=0, rpm=(1300, 1300), throttle=(1.5, 1.5), label="idle"),
        seg(3.0, gear=1, rpm=(2400, 7500), throttle=(55, 85), label="pull-away 1st"),
        seg(2.0, gear=2, rpm=(5200, 8000), throttle=(85, 85), label="2nd"),
        seg(8.0, gear=4, rpm=(4000, 4000), throttle=(18, 20), label="cruise"),
        seg(5.0, gear=4, rpm=(4000, 2000), throttle=(0, 0), label="overrun fuel cut"),
        seg(6.0, gear=3, rpm=(3600, 3600), throttle=(18, 18), rough=1.5, label="rough road"),
        seg(7.0, gear=3, rpm=(3400, 3800), throttle=(20, 24), label="misfire burst"),
        seg(5.0, gear=4, rpm=(3600, 3600), throttle=(20, 20), label="partial burn"),
        seg(3.0, gear=2, rpm=(3000, 2200), throttle=(8, 4), label="slowing"),
        seg(11.0, gear=0, rpm=(1300, 1300), throttle=(1.5, 1.5), label="idle"),
    )
    t_burst = sum(s.duration for s in segments[:6])
    t_partial = sum(s.duration for s in segments[:7])
    faults = (
        Fault("misfire", 2, start=t_burst + 1.0, end=t_burst + 3.5, probability=0.45),
        Fault("misfire", 1, start=t_burst + 4.5, end=t_burst + 7.0, probability=0.03),
        # Isolated misfires: spans of one firing interval or so, each catching one event.
        *(Fault("misfire", cyl, start=t, end=t + span) for cyl, t, span in (
            (1, 14.20, 0.012), (2, 16.40, 0.03), (2, 19.15, 0.03), (2, 21.70, 0.03),
            (1, 52.50, 0.09))),
        Fault("partial_burn", 1, start=t_partial + 1.0, end=t_partial + 4.0, fraction=0.45),
    )
    return Scenario(
        segments=segments, faults=faults, seed=20260101, name="demo test loop", rig="larch",
        start_time=START, wheel=WheelSpec(error_rms_deg=0.05),
        can=CanSpec(unknown_ids=(0x3F0, 0x7E8), unknown_rate_hz=5.0, drop_probability=0.0002),
        serial=SerialSpec(corrupt_probability=0.0005, lost_probability=0.0003, start_offset=5),
    )


def short_scenario(seed: int, *, layout: str | None = None, rig: str = "larch") -> Scenario:
    """A few seconds: idle, a gear, some misfires on each cylinder."""
    segs = (
        Segment(0.6, gear=0, rpm=(1300, 1300), throttle=(2, 2)),
        Segment(1.5, gear=2, rpm=(3000, 4200), throttle=(25, 30)),
    )
    faults = (Fault("misfire", 1, start=1.0, probability=0.06),
              Fault("misfire", 2, start=1.0, probability=0.06))
    return Scenario(segments=segs, faults=faults, seed=seed, name=f"short {layout or rig}",
                    rig=rig, start_time=START, engine=EngineSpec(true_layout=layout),
                    can=CanSpec(unknown_ids=(0x3F0,), unknown_rate_hz=5.0))


def bringup_scenario(ride: Scenario) -> Scenario:
    """The short log a bring-up asks for, on the bike of ``ride``: a blip in neutral, then a
    closed-throttle roll-off in neutral (the ECU cuts fuel: the rig check's TDC stretch)."""
    segs = (Segment(1.0, gear=0, rpm=(4000, 4000), throttle=(20, 20), label="blip in neutral"),
            Segment(3.0, gear=0, rpm=(4500, 2200), throttle=(0, 0), label="roll-off in neutral"))
    return ride.with_changes(segments=segs, faults=(), seed=ride.seed + 1000,
                             name=f"bring-up roll-off, {ride.name}")


def _layout_rig(folder: Path, layout: str) -> Path:
    """Larch's rig file with another layout: the rig describes the engine that is simulated."""
    text = (ROOT / "logger" / "presets" / "larch.toml").read_text(encoding="utf-8")
    text = text.replace('layout = "twin-270"', f'layout = "{layout}"', 1)
    text = text.replace('name = "larch"', f'name = "larch-{layout}"', 1)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "rig.toml"
    path.write_text(text, encoding="utf-8")
    return path


def build(out: Path) -> None:
    """Write every fixture into ``out`` (fixtures/ itself, or a temp dir for --check)."""
    out.mkdir(parents=True, exist_ok=True)
    # (folder, rig to simulate, scenario, CAN format, keep accelerometer captures)
    jobs: list[tuple[str, object, Scenario, str, bool]] = [
        ("demo", load_rig("larch"), demo_scenario(), ".log", True),
    ]
    for i, layout in enumerate(("twin-360", "twin-180", "twin-270", "vtwin-90")):
        rig = load_rig(_layout_rig(out / layout, layout))
        sc = short_scenario(101 + i, rig=f"fixtures/{layout}/rig.toml")
        jobs.append((layout, rig, sc, ".log", False))
    mismatch = short_scenario(201, layout="twin-360")
    jobs.append(("mismatch-360", load_rig("larch"), mismatch, ".log", False))
    jobs.append(("blf", load_rig("larch"), short_scenario(301), ".blf", False))
    if (ROOT / "logger" / "presets" / "alder.toml").exists():
        sc = Scenario(segments=(Segment(0.8, gear=0, rpm=(1200, 1200), throttle=(2, 2)),
                                Segment(1.7, gear=3, rpm=(4000, 5500), throttle=(30, 40))),
                      faults=(Fault("misfire", 3, start=1.3, probability=0.08),), seed=401,
                      name="short alder", rig="alder", start_time=START)
        jobs.append(("alder", load_rig("alder"), sc, ".asc", True))
    for name, rig, sc, fmt, captures in jobs:
        ride = simulate(rig, sc)
        if not captures:
            ride.accel.clear()
        write_ride(ride, out / name, can_format=fmt, stem=name)
        ev = ride.events
        print(f"  {name:<14} {sc.duration:5.1f} s  {len(ev):6d} events  "
              f"{int((~ev['fired'] & ~ev['fuel_cut']).sum()):4d} misfires")
        if name != "demo":  # the demo holds an overrun of its own (in gear)
            roll = simulate(rig, bringup_scenario(sc))
            roll.accel.clear()
            write_ride(roll, out / name / "bringup", can_format=fmt, stem="rolloff")
            print(f"  {name + '/bringup':<14} {roll.events['fuel_cut'].sum():6d} events "
                  "without firing")


def hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != "README.md"}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true",
                    help="regenerate into a temporary directory and compare with fixtures/")
    args = ap.parse_args(argv)
    if args.check:
        with tempfile.TemporaryDirectory() as tmp:
            build(Path(tmp))
            new, old = hashes(Path(tmp)), hashes(FIXTURES)
        diff = sorted(k for k in set(new) | set(old) if new.get(k) != old.get(k))
        for k in diff:
            print(f"differs: {k}")
        print("fixtures regenerate bit for bit" if not diff else f"{len(diff)} files differ")
        return 1 if diff else 0
    for child in FIXTURES.iterdir() if FIXTURES.exists() else ():
        if child.is_dir():
            shutil.rmtree(child)
    build(FIXTURES)
    total = sum(p.stat().st_size for p in FIXTURES.rglob("*") if p.is_file())
    print(f"fixtures/: {total / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
