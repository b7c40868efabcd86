"""Exports of the demo run, read back with each format's own library (the csv and json modules,
pyarrow.parquet, asammdf) and compared value by value with the store."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.events import MISFIRE, VERDICT_NAMES
from crankbeat.errors import UsageError
from crankbeat.logger.cli.main import main
from crankbeat.logger.export import channels_table, events_table, open_writer
from crankbeat.logger.rig import load_rig
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "fixtures" / "demo"


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory):
    from crankbeat.logger.pipeline import analyse_replay

    if not (DEMO / "demo.log").is_file():
        pytest.skip("fixtures/demo is missing (make fixtures)")
    db = tmp_path_factory.mktemp("export") / "demo.db"
    with Store.open(db) as store:
        result = analyse_replay(load_rig("larch"), DEMO / "demo.log",
                                {"bar_left": DEMO / "demo.bar_left.acraw"}, store, label="demo")
        events = store.events(result.run_id)
        channels = store.channels(result.run_id)
    return db, events, channels


def _export(db: Path, out: Path, command: str = "events") -> None:
    assert main([command, "demo", "--store", str(db), "--out", str(out)]) == 0


def _same_floats(a, b, **kw) -> None:
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), equal_nan=True, **kw)


def test_channels_are_stored_at_10_hz_with_what_the_rig_decodes(demo_store):
    _, events, channels = demo_store
    # the Larch's status frame carries these (its rig file, preset larch)
    assert set(channels) == {"rpm", "throttle", "gear", "coolant", "road_speed"}
    t, rpm = channels["rpm"]
    assert 59 <= len(t) / 10.0 <= 61  # a 60 s ride (fixtures/README.md) at 10 Hz
    assert np.all(np.diff(np.floor(t / 0.1)) >= 1)  # one sample per 0.1 s bin
    # the ECU's rpm agrees with the crank's at the events (both read the same simulated engine)
    ev = events[np.isfinite(events["rpm"]) & (events["rpm"] > 1500)]
    at = np.interp(ev["t"], t, rpm)
    assert np.median(np.abs(at - ev["rpm"]) / ev["rpm"]) < 0.05


def test_parquet_read_back_by_pyarrow_equals_the_store(demo_store, tmp_path):
    import pyarrow.parquet as pq

    db, events, _ = demo_store
    _export(db, tmp_path / "ev.parquet")
    table = pq.read_table(tmp_path / "ev.parquet")
    assert table.num_rows == len(events) > 1000
    for col in ("t", "rpm", "throttle", "metric", "threshold", "confidence", "interval_deg",
                "expected_interval_deg", "contribution"):
        _same_floats(table.column(col).to_numpy(), events[col], rtol=0, atol=0)
    for col in ("cycle", "cylinder"):
        np.testing.assert_array_equal(table.column(col).to_numpy(), events[col])
    names = [VERDICT_NAMES[int(v)] for v in events["verdict"]]
    assert table.column("verdict").to_pylist() == names
    np.testing.assert_array_equal(table.column("misfire").to_numpy(),
                                  events["verdict"] == MISFIRE)
    assert table.schema.field("rpm").metadata[b"unit"] == b"rpm"
    assert table.schema.metadata[b"label"] == b"demo"


def test_mdf4_read_back_by_asammdf_holds_events_and_channels(demo_store, tmp_path):
    from asammdf import MDF

    db, events, channels = demo_store
    _export(db, tmp_path / "run.mf4")
    with MDF(tmp_path / "run.mf4") as mdf:
        ev_group = next(i for i, g in enumerate(mdf.groups)
                        if g.channel_group.comment.startswith("events"))
        comment = mdf.groups[ev_group].channel_group.comment
        origin = float(comment.split("origin=")[1].split(";")[0])
        rpm = mdf.get("rpm", group=ev_group)
        verdict = mdf.get("verdict", group=ev_group, raw=True)
        verdict_text = mdf.get("verdict", group=ev_group, raw=False)
        ch_group = next(i for i, g in enumerate(mdf.groups)
                        if g.channel_group.comment.startswith("channels"))
        gear = mdf.get("gear", group=ch_group)
        coolant = mdf.get("coolant", group=ch_group)
    ok = np.isfinite(events["t"])
    ev = events[ok][np.argsort(events["t"][ok], kind="stable")]
    _same_floats(rpm.timestamps + origin, ev["t"], rtol=0, atol=1e-6)
    _same_floats(rpm.samples, ev["rpm"])
    np.testing.assert_array_equal(verdict.samples, ev["verdict"])
    assert {v.decode() for v in verdict_text.samples} <= set(VERDICT_NAMES.values())
    assert rpm.unit == "rpm"
    _same_floats(gear.timestamps + origin, channels["gear"][0], rtol=0, atol=1e-6)
    _same_floats(gear.samples, channels["gear"][1])
    _same_floats(coolant.samples, channels["coolant"][1])
    assert coolant.unit == "degC"


def test_csv_and_json_lines_read_back_by_the_standard_library(demo_store, tmp_path):
    db, events, _ = demo_store
    _export(db, tmp_path / "ev.csv")
    _export(db, tmp_path / "ev.jsonl")
    with open(tmp_path / "ev.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    lines = [json.loads(line) for line in (tmp_path / "ev.jsonl").read_text().splitlines()]
    assert len(rows) == len(lines) == len(events)
    t_csv = [float(r["t"]) if r["t"] else np.nan for r in rows]
    _same_floats(t_csv, events["t"], rtol=0, atol=5e-7)  # 6 decimals
    t_json = [np.nan if r["t"] is None else r["t"] for r in lines]
    _same_floats(t_json, events["t"], rtol=0, atol=0)
    assert [r["verdict"] for r in lines] == [VERDICT_NAMES[int(v)] for v in events["verdict"]]
    assert [int(r["cylinder"]) for r in rows] == events["cylinder"].tolist()


def test_channels_command_writes_parquet(demo_store, tmp_path):
    import pyarrow.parquet as pq

    db, _, channels = demo_store
    _export(db, tmp_path / "ch.parquet", command="channels")
    table = pq.read_table(tmp_path / "ch.parquet")
    _same_floats(table.column("t").to_numpy(), channels["gear"][0], rtol=0, atol=0)
    _same_floats(table.column("road_speed").to_numpy(), channels["road_speed"][1])


def test_writers_take_a_file_object_and_refuse_a_second_table(demo_store):
    import pyarrow.parquet as pq

    _, events, channels = demo_store
    buf = io.BytesIO()
    with open_writer(buf, suffix=".parquet") as w:
        w.write(events_table(events[:10]))
        with pytest.raises(Exception, match="one table"):
            w.write(channels_table(channels))
    buf.seek(0)
    assert pq.read_table(buf).num_rows == 10


def test_unknown_suffix_is_a_usage_error(tmp_path):
    with pytest.raises(UsageError, match="no export format for '.xlsx'"):
        open_writer(tmp_path / "x.xlsx")
    assert not (tmp_path / "x.xlsx").exists()


def test_a_missing_extra_is_named(monkeypatch, tmp_path):
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a: None if name == "pyarrow" else real(name, *a))
    with pytest.raises(UsageError, match=r"needs pyarrow: pip install 'crankbeat\[export\]'"):
        open_writer(tmp_path / "x.parquet")
