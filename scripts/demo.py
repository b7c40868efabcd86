"""`make demo`: replay the shipped demo ride into a fresh store and write its report.

No hardware, no network: the demo ride of the invented Larch mule lives in fixtures/demo/.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

from crankbeat.logger.cli.main import main as crankbeat

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"
OUT = ROOT / "demo-out"


def demo_files() -> tuple[Path, list[Path]]:
    logs = sorted(DEMO.glob("*.log"))
    if not logs:
        sys.exit(f"error: no demo ride in {DEMO} (run `make fixtures` to regenerate it)")
    return logs[0], sorted(DEMO.glob("*.acraw"))


def main() -> int:
    can_log, captures = demo_files()
    if OUT.exists():
        shutil.rmtree(OUT)
    OUT.mkdir()
    store = OUT / "crankbeat.db"
    print(f"crankbeat demo: replaying {can_log.relative_to(ROOT)} "
          f"(+ {len(captures)} accelerometer capture) of the invented Larch test mule\n")
    argv = ["replay", "--rig", "larch", "--can", str(can_log), "--store", str(store),
            "--odometer", "1520", "--notes", "demo ride on the test loop"]
    for cap in captures:
        argv += ["--accel", str(cap)]
    rc = crankbeat(argv + ["--label", "demo-loop-new-wheel"])
    if rc != 0:
        return rc
    print("\n--- The first run learnt the trigger wheel's tooth spacing errors on its overrun fuel "
          "cut\n--- and applied them from then on. A later ride of this rig (here: the same one "
          "again)\n--- applies them from its first revolution:\n")
    rc = crankbeat(argv + ["--label", "demo-loop", "--force"])
    if rc != 0:
        return rc
    report_dir = OUT / "report"
    rc = crankbeat(["report", "last", "--store", str(store), "--out", str(report_dir)])
    if rc != 0:
        return rc
    print(f"\nstore:  {store.relative_to(ROOT)}")
    print(f"report: {(report_dir / 'index.html').relative_to(ROOT)} (open it in a browser)")
    print("try:    .venv/bin/crankbeat events last --store demo-out/crankbeat.db | head")
    return 0


if __name__ == "__main__":
    sys.exit(main())
