"""Score a run's detected events against the simulator's truth file.

    python scripts/score_ride.py EVENTS.csv TRUTH.csv [--tolerance-s S] [--json]

EVENTS.csv is what ``crankbeat events RUN --format csv`` writes (columns at least t, cylinder and
misfire (0/1) or verdict); TRUTH.csv is ``<stem>.truth.csv`` of the simulator (t, cycle, cylinder,
fired, ..., fuel_cut). The scorer is :func:`dsp.scoring.score_misfire`, the one the tests use.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from dataclasses import asdict

import numpy as np

from crankbeat.dsp.scoring import score_misfire
from crankbeat.errors import CrankbeatError, InputError

_TRUE = {"1", "true", "yes", "t", "y"}


def _read(path: str, need: tuple[str, ...]) -> dict[str, np.ndarray]:
    try:
        with open(path, newline="") as fh:
            rows = list(csv.DictReader(fh))
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror})") from exc
    if not rows:
        raise InputError(f"{path}: no rows")
    cols = {k.strip(): k for k in rows[0].keys() if k is not None}
    missing = [c for c in need if c not in cols]
    if missing:
        raise InputError(f"{path}: missing column(s) {', '.join(missing)}; has {', '.join(cols)}")
    out: dict[str, np.ndarray] = {}
    for name, key in cols.items():
        vals = [r[key] for r in rows]
        try:
            out[name] = np.array([float(v) if v != "" else np.nan for v in vals])
        except ValueError:
            out[name] = np.array([v.strip() for v in vals])
    return out


def _flag(col: np.ndarray) -> np.ndarray:
    if col.dtype.kind == "f":
        return col > 0.5
    return np.array([v.lower() in _TRUE for v in col])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="score detected misfires against simulator truth")
    ap.add_argument("events", help="events CSV (t, cylinder, misfire and/or verdict)")
    ap.add_argument("truth", help="truth CSV of the simulator")
    ap.add_argument("--tolerance-s", type=float, default=None, help="largest match distance, s")
    ap.add_argument("--json", action="store_true", help="print the score as JSON")
    args = ap.parse_args(argv)
    try:
        ev = _read(args.events, ("t", "cylinder"))
        tr = _read(args.truth, ("t", "cylinder", "fired"))
        det = {"t": ev["t"], "cylinder": ev["cylinder"].astype(float).astype(int)}
        if "misfire" in ev:
            det["misfire"] = _flag(ev["misfire"])
        if "verdict" in ev:
            v = ev["verdict"]
            det["verdict"] = v.astype(int) if v.dtype.kind == "f" else v
        if "misfire" not in det and "verdict" not in det:
            raise InputError(f"{args.events}: needs a misfire or a verdict column")
        truth = {
            "t": tr["t"],
            "cylinder": tr["cylinder"].astype(float).astype(int),
            "fired": _flag(tr["fired"]),
        }
        if "fuel_cut" in tr:
            truth["fuel_cut"] = _flag(tr["fuel_cut"])
        score = score_misfire(det, truth, tolerance_s=args.tolerance_s)
    except CrankbeatError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    if args.json:
        print(json.dumps(asdict(score), default=float, indent=2))
    else:
        print(score.summary())
        for cyl, c in sorted(score.per_cylinder.items()):
            print(
                f"  cylinder {cyl}: {c['detected']}/{c['true_misfires']} misfires found, "
                f"{c['false_alarms']} false alarms in {c['true_fired']} fired events"
            )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
