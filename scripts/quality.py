"""`make quality`: misfire verdicts, layout check and intervals on rides the analyser is not told.

    python scripts/quality.py                       # the full matrix, 5 seeds (~15-20 min, 2 jobs)
    python scripts/quality.py --only dead/alder --seeds 2
    python scripts/quality.py --quick               # rides a third as long: a dry run
    python scripts/quality.py --first-seed 5        # five other rides per cell: held out
    python scripts/quality.py --analyser-rev REV    # analyse with an older commit (a BEFORE table)

Every ride is simulated with physics drawn per seed (bench/quality/rides.py), written as the
rig's CAN log and accelerometer captures, then analysed exactly as a user would: `crankbeat
replay`, `crankbeat events --format csv`, `crankbeat show --json`, and scored against the truth
file (bench/quality/score.py). Simulated rides are cached under bench-out/quality/rides/ by the
scenario's hash, so a re-run only analyses again. Prints a line per finished ride, then ONE
table; writes bench-out/quality/<label>.txt and .json. Exits 1 when a target is missed.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.quality.rides import KINDS, RIGS  # noqa: E402
from bench.quality.run import run_ride  # noqa: E402
from bench.quality.table import build, render  # noqa: E402


def _cells(only: str | None) -> list[tuple[str, str]]:
    cells = [(k, r) for k in KINDS for r in RIGS]
    if not only:
        return cells
    picked = []
    for part in only.split(","):
        kind, _, rig = part.strip().partition("/")
        sel = [(k, r) for k, r in cells if k == kind and (not rig or r == rig)]
        if not sel:
            names = ", ".join(f"{k}/{r}" for k, r in cells)
            raise SystemExit(f"error: --only {part!r} names no cell; cells: {names}")
        picked += sel
    return picked


def _source_tree(rev: str, out: Path) -> str:
    """Export commit ``rev`` and lay it out as the ``crankbeat`` package; its PYTHONPATH."""
    sha = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", rev], check=True,
                         capture_output=True, text=True).stdout.strip()
    base = out / "src" / sha
    path = base / "path"
    if not (path / "crankbeat").exists():
        tree = base / "tree"
        tree.mkdir(parents=True, exist_ok=True)
        archive = subprocess.run(["git", "-C", str(ROOT), "archive", sha], check=True,
                                 capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
        pkg = path / "crankbeat"
        pkg.mkdir(parents=True)
        for f in (tree / "crankbeat").glob("*.py"):
            (pkg / f.name).write_bytes(f.read_bytes())
        (pkg / "dsp").symlink_to((tree / "dsp").resolve())
        (pkg / "logger").symlink_to((tree / "logger").resolve())
    return str(path.resolve())


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=5, help="rides per cell (default 5)")
    ap.add_argument("--first-seed", type=int, default=0,
                    help="first seed of each cell (default 0); seeds at or past 5 are rides the "
                         "matrix's usual run never drew, a check for settings tuned to it")
    ap.add_argument("--only", help="cells KIND[/RIG], comma-separated, e.g. dead/alder,rough")
    ap.add_argument("--jobs", type=int, default=2, help="rides at once (default 2)")
    ap.add_argument("--quick", action="store_true", help="rides a third as long (dry run)")
    ap.add_argument("--analyser-rev", help="analyse with this git commit instead of the install")
    ap.add_argument("--label", help="name of the output files (default: current or the rev)")
    ap.add_argument("--out", default=str(ROOT / "bench-out" / "quality"), help="output folder")
    args = ap.parse_args(argv)
    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    pythonpath = _source_tree(args.analyser_rev, out) if args.analyser_rev else None
    label = args.label or (f"rev-{args.analyser_rev}" if args.analyser_rev else "current")
    label += "-quick" if args.quick else ""
    tasks = [dict(kind=k, rig=r, seed=s, quick=args.quick, out=str(out), label=label,
                  pythonpath=pythonpath)
             for k, r in _cells(args.only)
             for s in range(args.first_seed, args.first_seed + args.seeds)]
    print(f"quality: {len(tasks)} rides, {args.jobs} at once, analyser "
          f"{args.analyser_rev or 'installed crankbeat'}", flush=True)
    results, errors = [], []
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        futs = {pool.submit(run_ride, t): t for t in tasks}
        for i, fut in enumerate(as_completed(futs), 1):
            t = futs[fut]
            name = f"{t['kind']}/{t['rig']}#{t['seed']}"
            try:
                r = fut.result()
            except Exception as exc:  # one broken ride is a missed target, not a crash
                errors.append(dict(t, error=str(exc)))
                print(f"[{i}/{len(tasks)}] {name}: ERROR {exc}", flush=True)
                continue
            results.append(r)
            b = r["bands"]["all"]
            print(f"[{i}/{len(tasks)}] {name}: misfires {b.get('detected', 0)}/"
                  f"{b.get('true_mis', 0)} false {b.get('false_alarms', 0)} unusable "
                  f"{b.get('unusable', 0)}/{b.get('matched', 0)} J x{r['effective_inertia_x']:.2f}"
                  f" wheel {r['wheel_rms_deg']:.3f} deg {'(cached ride) ' if r['cached'] else ''}"
                  f"{r['total_s']:.0f} s", flush=True)
    rows = build(results, errors)
    text = render(rows)
    minutes = (time.perf_counter() - t0) / 60.0
    head = (f"make quality ({label}): {len(results)} rides ok, {len(errors)} failed, "
            f"{minutes:.1f} min; det/fa % over the row's band, unus = unusable+masked share")
    print("\n" + head + "\n" + text)
    (out / f"{label}.txt").write_text(head + "\n" + text + "\n")
    (out / f"{label}.json").write_text(json.dumps({"results": results, "errors": errors},
                                                  indent=1, default=str))
    return 0 if all(r.ok for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
