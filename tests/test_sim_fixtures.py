"""The shipped fixtures regenerate bit for bit, and `crankbeat synth` writes what it says."""

from __future__ import annotations

import hashlib
from pathlib import Path

import can
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.rig import load_rig
from crankbeat.logger.sim import load_scenario, read_truth, simulate, write_ride

ROOT = Path(__file__).resolve().parent.parent
FIX = ROOT / "fixtures"


def _sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


@pytest.mark.parametrize(
    "name, fmt", [("twin-270", ".log"), ("blf", ".blf"), ("alder", ".asc")]
)
def test_fixture_regenerates_from_its_scenario(name, fmt, tmp_path):
    folder = FIX / name
    if not (folder / f"{name}.scenario.toml").exists():
        pytest.skip(f"fixture {name} not generated (run `make fixtures`)")
    sc = load_scenario(folder / f"{name}.scenario.toml")
    rig = load_rig(ROOT / sc.rig if sc.rig.endswith(".toml") else sc.rig)
    ride = simulate(rig, sc)
    keep = {p.name.split(".")[1] for p in folder.glob(f"{name}.*.acraw")}
    for sensor in list(ride.accel):
        if sensor not in keep:
            del ride.accel[sensor]
    write_ride(ride, tmp_path, can_format=fmt, stem=name)
    for p in sorted(folder.glob(f"{name}.*")):
        assert _sha(tmp_path / p.name) == _sha(p), p.name


def test_demo_fixture_has_what_the_readme_promises():
    truth = FIX / "demo" / "demo.truth.csv"
    if not truth.exists():
        pytest.skip("demo fixture not generated (run `make fixtures`)")
    ev = read_truth(truth)
    miss = ~ev["fired"] & ~ev["fuel_cut"]
    assert 55.0 < ev["t"][-1] - ev["t"][0] < 90.0
    assert miss[ev["cylinder"] == 2].sum() >= 20  # the burst
    assert ev["fuel_cut"].sum() > 100 and ev["rough"].sum() > 100
    assert not (miss & ev["rough"]).any()
    assert ((ev["burn_fraction"] > 0) & (ev["burn_fraction"] < 1)).sum() > 30
    assert ev["rpm"].max() > 7500
    # fixtures/README.md keeps the total under 8 MB (7.46 MB with the bring-up roll-offs)
    assert sum(p.stat().st_size for p in FIX.rglob("*") if p.is_file()) <= 8_000_000


def test_synth_command_writes_a_ride(tmp_path, capsys):
    assert main(["synth", "--help"]) == 0
    out = tmp_path / "r"
    code = main(["synth", "--rig", "larch", "--duration", "1.5", "--rpm", "2500:3500",
                 "--gear", "2",
                 "--throttle", "25", "--misfire-cylinder", "1", "--misfire-rate", "0.2",
                 "--can-format", ".csv", "--seed", "4", "--out", str(out), "--quiet"])
    assert code == 0
    text = capsys.readouterr().out
    assert "misfires" in text and str(out / "ride.csv") in text
    with can.LogReader(out / "ride.csv") as r:
        assert sum(1 for _ in r) > 300
    ev = read_truth(out / "ride.truth.csv")
    assert (~ev["fired"][ev["cylinder"] == 1]).sum() > 0
    assert main(["synth", "--rpm", "fast", "--out", str(out)]) == 2  # one-line usage error
    assert "error:" in capsys.readouterr().err
