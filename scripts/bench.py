"""`make bench`: throughput, latency and memory of crankbeat as ratios to floors timed alongside.

    python scripts/bench.py                     # everything (about 10 minutes; rides cached)
    python scripts/bench.py --groups replay,decode --repeat 1
    python scripts/bench.py --quick             # 1- and 2-minute rides, 5 s live: a dry run

Prints progress, then one table (figure, measured, target, ratio, result) and the profile of a
replay; writes bench-out/results.json, bench-out/table.txt and bench-out/profile.txt. Exits 1
when any target is missed or any figure could not be measured (a missing part is a missed
target), 0 when every target passes.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench import measure  # noqa: E402
from bench.fleet import fleet_rows  # noqa: E402
from bench.table import failed, render  # noqa: E402

GROUPS = ("replay", "decode", "memory", "scaling", "live", "fleet", "profile")


def _versions() -> dict:
    out = {"python": platform.python_version()}
    for mod in ("numpy", "scipy", "can", "serial", "sqlite_utils"):
        try:
            out[mod] = __import__(mod).__version__
        except (ImportError, AttributeError):
            out[mod] = None
    import sqlite3

    out["sqlite"] = sqlite3.sqlite_version
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--groups", default=",".join(GROUPS),
                    help=f"comma-separated subset of {','.join(GROUPS)}")
    ap.add_argument("--repeat", type=int, default=2,
                    help="runs of each short timing; the best counts (default 2)")
    ap.add_argument("--minutes", default="1,10,60",
                    help="ride lengths for scaling; the largest is the memory ride")
    ap.add_argument("--main-minutes", type=int, default=10,
                    help="ride behind the floor, decode and memory-baseline figures")
    ap.add_argument("--live-seconds", type=float, default=25.0)
    ap.add_argument("--profile-minutes", type=int, default=2)
    ap.add_argument("--quick", action="store_true",
                    help="short rides (1 and 2 min, 5 s live): checks the harness, not targets")
    ap.add_argument("--out", type=Path, default=ROOT / "bench-out")
    args = ap.parse_args(argv)

    groups = [g.strip() for g in args.groups.split(",") if g.strip()]
    bad = sorted(set(groups) - set(GROUPS))
    if bad:
        print(f"error: unknown group {bad[0]!r}, expected some of {', '.join(GROUPS)}",
              file=sys.stderr)
        return 2
    minutes = tuple(sorted({int(m) for m in args.minutes.split(",")}))
    main_minutes, live_s, prof_m = args.main_minutes, args.live_seconds, args.profile_minutes
    if args.quick:
        minutes, main_minutes, live_s, prof_m = (1, 2), 1, 5.0, 1
    if main_minutes not in minutes:
        minutes = tuple(sorted({*minutes, main_minutes}))

    args.out.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()

    def say(text: str) -> None:
        print(f"[{time.perf_counter() - start:6.1f} s] {text}", flush=True)

    b = measure.Bench(out=args.out, say=say, repeat=args.repeat, minutes=minutes,
                      main_minutes=main_minutes, live_seconds=live_s, profile_minutes=prof_m)
    load0 = os.getloadavg()
    say(f"crankbeat bench: groups {', '.join(groups)}; rides {', '.join(map(str, minutes))} min; "
        f"load average {load0[0]:.1f} on {os.cpu_count()} cores; replays pinned to cpu {b.cpu}")
    rows = []
    fns = {"replay": measure.replay_rows, "decode": measure.decode_rows,
           "memory": measure.memory_rows, "scaling": measure.scaling_rows,
           "live": measure.live_rows, "fleet": fleet_rows}
    for g in groups:
        if g in fns:
            rows += fns[g](b)
    profile = measure.profile_text(b) if "profile" in groups else ""
    load1 = os.getloadavg()
    took = time.perf_counter() - start

    table = render(rows)
    print()
    print(table)
    print(f"load average {load0[0]:.1f} at the start, {load1[0]:.1f} at the end; "
          f"bench took {took:.0f} s (ride generation included, untimed).")
    if args.quick:
        print("--quick: short rides; the figures check the harness, not the targets.")
    if profile:
        print()
        print(profile)
    (args.out / "table.txt").write_text(table + "\n", encoding="utf-8")
    if profile:
        (args.out / "profile.txt").write_text(profile + "\n", encoding="utf-8")
    doc = {"rows": [r.as_dict() for r in rows], "raw": b.raw, "versions": _versions(),
           "load_average": [load0[0], load1[0]], "cpu_count": os.cpu_count(),
           "quick": args.quick, "took_s": took,
           "when_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    (args.out / "results.json").write_text(json.dumps(doc, indent=1, default=str),
                                           encoding="utf-8")
    bad_rows = failed(rows)
    if bad_rows:
        print(f"\n{len(bad_rows)} figure(s) missed or not measured: "
              + "; ".join(r.figure for r in bad_rows))
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
