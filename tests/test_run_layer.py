"""The run layer on its own: channel decimation, the library replay giving what the CLI gives,
and a paced (step-by-step) replay storing the same rows as a whole-output replay."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger.chunks import StatusBlock
from crankbeat.logger.pipeline import analyse_replay
from crankbeat.logger.rig import load_rig
from crankbeat.logger.run.channels import ChannelDecimator
from crankbeat.logger.run.version import analyser_version
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parent.parent
BLF = ROOT / "fixtures" / "blf" / "blf.blf"


def _decimate(t, gear, cuts):
    dec = ChannelDecimator(0.1)
    for a, b in zip(cuts[:-1], cuts[1:]):
        dec.push(StatusBlock(t[a:b], {"gear": gear[a:b], "engine_speed": gear[a:b] * 1000.0}))
    dec.finish()
    return dec.take()


def test_channels_keep_each_tenths_last_sample_whatever_the_chunking():
    # 100 Hz status for 3 s: one row per 0.1 s bin, the bin's last sample, its own time
    t = np.arange(300) * 0.01 + 0.003
    gear = np.repeat([1.0, 2.0, 3.0], 100)
    whole = _decimate(t, gear, [0, 300])
    split = _decimate(t, gear, [0, 7, 8, 150, 151, 299, 300])
    for name in ("gear", "rpm"):
        np.testing.assert_array_equal(whole[name][0], split[name][0])
        np.testing.assert_array_equal(whole[name][1], split[name][1])
    tt, g = whole["gear"]
    assert len(tt) == 30
    np.testing.assert_allclose(tt, t[9::10])  # the 10th sample of each tenth
    np.testing.assert_array_equal(g, gear[9::10])


@pytest.fixture(scope="module")
def rig():
    if not BLF.is_file():
        pytest.skip("fixtures/blf is missing (make fixtures)")
    return load_rig("larch")


def test_library_replay_dates_the_run_by_the_ride_and_names_its_analyser(rig, tmp_path):
    import can

    with Store.open(tmp_path / "s.db") as store:
        result = analyse_replay(rig, BLF, {}, store)
        run = store.run(result.run_id)
    with can.LogReader(str(BLF)) as reader:  # python-can's own reader: the ride's first frame
        first = next(iter(reader)).timestamp
    assert abs(datetime.fromisoformat(run["started_at"]).timestamp() - first) <= 2.0
    assert run["analyser"] == analyser_version()


def test_paced_replay_stores_the_same_rows_as_a_whole_output(rig, tmp_path):
    rows = []
    for pace in (None, 50.0):
        with Store.open(tmp_path / f"s{pace}.db") as store:
            run_id = analyse_replay(rig, BLF, {}, store, pace=pace).run_id
            rows.append((store.events(run_id), store.windows(run_id), store.intervals(run_id),
                         store.channels(run_id)))
    (ea, wa, ia, ca), (eb, wb, ib, cb) = rows
    for col in ea.dtype.names:
        np.testing.assert_array_equal(ea[col], eb[col], err_msg=col)
    assert wa == wb and ia == ib
    assert set(ca) == set(cb) and all(np.array_equal(ca[k][1], cb[k][1]) for k in ca)


def test_analysis_holds_blas_to_one_thread_and_gives_the_callers_setting_back(rig):
    # A library caller (a fleet worker) need not set *_NUM_THREADS: pool threads only spin on
    # the small blocks the analysis streams. threadpoolctl reads the pools' real sizes.
    from threadpoolctl import threadpool_info, threadpool_limits

    from crankbeat.logger.run.drive import analyse_files

    seen: list[int] = []

    def on_step(out, chunk):
        seen.extend(p["num_threads"] for p in threadpool_info())

    with threadpool_limits(limits=2):
        before = [p["num_threads"] for p in threadpool_info()]
        analyse_files(rig, BLF, {}, on_step=on_step)
        after = [p["num_threads"] for p in threadpool_info()]
    assert seen and set(seen) == {1}
    assert after == before


def test_analyser_version_follows_the_analysing_code():
    # every source file of the stages, the decoders and the run layer is in the fingerprint, so
    # a change of any of them is a new version (a batch then re-analyses rather than skips)
    import re

    from crankbeat.logger.run import version

    names = {n for n, _ in version.analysing_files()}
    for folder, pkg in (("dsp", "crankbeat.dsp"), ("logger/run", "crankbeat.logger.run"),
                        ("logger/can", "crankbeat.logger.can"),
                        ("logger/serial", "crankbeat.logger.serial")):
        for path in (ROOT / folder).rglob("*.py"):
            assert f"{pkg}/{path.relative_to(ROOT / folder).as_posix()}" in names, path
    files = version.analysing_files()
    base = version.fingerprint(files)
    name, data = files[3]
    assert version.fingerprint(files[:3] + [(name, data + b"\n")] + files[4:]) != base
    assert version.fingerprint(files + [("crankbeat.dsp/new.py", b"")]) != base
    assert re.fullmatch(r".+\+r\d+\.[0-9a-f]{8}", analyser_version())
    assert analyser_version().endswith(base)
