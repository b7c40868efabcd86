"""Damage >= 10^6 lines, objects, records and frames and check every reader (``make fuzz``).

For each format, rounds of tests/fuzzkit.py: a clean recording written by an independent
writer (python-can's writers, the capture writer, the frame encoder), a share of its units
damaged in random ways (bit flips, cuts, inserted garbage, zeroed blocks, bad lengths and
times), read by crankbeat and compared with a reference reading of the undamaged units
(python-can's own reader; the records or frames as written). Prints progress, then one table:

    format | damaged units | files | clean answers | crashes | reference frames | kept | kept %

"clean" = the file was read, or refused with one line (a crankbeat error); a crash is any
other exception (a traceback, shown after the table). Exit 1 on any crash or any reference
frame not kept.

Usage: ``python scripts/fuzz.py [--scale 1.0] [--seed 1] [--formats asc,blf]``
"""

from __future__ import annotations

import argparse
import logging
import random
import sys
import tempfile
import time
from importlib import resources
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import fuzzkit  # noqa: E402 - the kit lives with the tests that use it too

#: Damaged units per format at scale 1 (about 1.1 M in all), units per round, damaged share.
PLAN = {
    "candump-fast": (200_000, 5000, 0.5),
    "candump-python-can": (100_000, 5000, 0.5),
    "asc": (100_000, 5000, 0.5),
    "csv": (100_000, 5000, 0.5),
    "trc": (70_000, 5000, 0.5),
    "blf": (80_000, 2000, 0.5),
    "acraw": (80_000, 5000, 0.2),
    "serial-frames": (300_000, 10_000, 0.5),
    "rig": (1_000, 1, 1.0),
}


def _progress(fmt: str, done: int, goal: int, t0: float, final: bool = False) -> None:
    rate = done / max(time.monotonic() - t0, 1e-9)
    line = f"  {fmt:<20} {done:>9,} / {goal:,} damaged units  ({rate:,.0f}/s)"
    if sys.stderr.isatty():
        print("\r" + line, end="\n" if final else "", file=sys.stderr, flush=True)
    elif final:
        print(line, file=sys.stderr, flush=True)


def run(formats: list[str], scale: float, seed: int) -> dict[str, fuzzkit.Tally]:
    rig_text = resources.files("crankbeat.logger.presets").joinpath("larch.toml").read_text(
        "utf-8")
    results: dict[str, fuzzkit.Tally] = {}
    with tempfile.TemporaryDirectory(prefix="crankbeat-fuzz-") as tmp:
        for fmt in formats:
            goal, n, share = PLAN[fmt]
            goal = max(1, int(goal * scale))
            rng = random.Random(f"{seed}-{fmt}")
            tally, bases, t0, last = fuzzkit.Tally(), {}, time.monotonic(), 0.0
            while tally.tried < goal:
                tally.merge(fuzzkit.run_round(fmt, rng, Path(tmp), n, share, rig_text, bases))
                if time.monotonic() - last > 0.5:
                    last = time.monotonic()
                    _progress(fmt, tally.tried, goal, t0)
            _progress(fmt, tally.tried, goal, t0, final=True)
            results[fmt] = tally
    return results


def table(results: dict[str, fuzzkit.Tally]) -> str:
    head = ("format", "damaged", "files", "clean", "crashes", "ref frames", "kept", "kept %")
    rows = [head]
    for fmt, t in results.items():
        pct = f"{100 * t.kept / t.ref_frames:.3f}" if t.ref_frames else "-"
        rows.append((fmt, f"{t.tried:,}", f"{t.files:,}", f"{t.clean:,}", f"{t.crashes:,}",
                     f"{t.ref_frames:,}", f"{t.kept:,}", pct))
    total = sum(t.tried for t in results.values())
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = [" | ".join(c.ljust(w) if i == 0 else c.rjust(w)
                        for i, (c, w) in enumerate(zip(r, widths, strict=True))) for r in rows]
    lines.insert(1, "-+-".join("-" * w for w in widths))
    lines.append(f"total damaged units: {total:,}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0, help="multiply every format's units")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--formats", default=",".join(fuzzkit.FORMATS),
                    help="comma-separated, of: " + ", ".join(fuzzkit.FORMATS))
    args = ap.parse_args(argv)
    formats = [f for f in args.formats.split(",") if f]
    unknown = [f for f in formats if f not in PLAN]
    if unknown or args.scale <= 0:
        ap.error(f"unknown format(s) {unknown}" if unknown else "--scale must be > 0")
    logging.disable(logging.WARNING)  # python-can logs every line it cannot parse
    t0 = time.monotonic()
    print(f"fuzzing {', '.join(formats)} (seed {args.seed}, scale {args.scale:g})",
          file=sys.stderr)
    results = run(formats, args.scale, args.seed)
    print(table(results))
    print(f"time: {time.monotonic() - t0:.0f} s")
    bad = [(f, t) for f, t in results.items() if t.crashes or t.kept < t.ref_frames]
    for fmt, t in bad:
        print(f"\n{fmt}: {t.crashes} crash(es), {t.lost} reference frame(s) not kept")
        for ex in t.examples:
            print(ex)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
