"""Live catch-up: when the analysis falls behind, a bus batch that completes several chunks
closes them as one, and not a single verdict changes.

The chunks are made by the real merger over a simulated ride written to files (python-can's log
format); batches are cut small so that each spans several chunk boundaries, as a live queue does
after a slow step. The reference is the same merger closing every chunk on its own.
"""

from __future__ import annotations

import numpy as np
import pytest

import crankbeat.logger.stream as stream_mod
from crankbeat.logger import pipeline
from crankbeat.logger.rig import load_rig
from crankbeat.logger.run.drive import drive
from crankbeat.logger.sim import Fault, Scenario, Segment, simulate, write_ride


@pytest.fixture(scope="module")
def ride(tmp_path_factory):
    rig = load_rig("larch")
    scenario = Scenario(
        segments=(Segment(2.0, gear=0, rpm=(1300, 1300), throttle=(2, 2)),
                  Segment(5.0, gear=2, rpm=(3000, 7000), throttle=(30, 60))),
        faults=(Fault("misfire", 2, start=2.5, end=6.0, probability=0.08),),
        seed=11,
    )
    return rig, write_ride(simulate(rig, scenario), tmp_path_factory.mktemp("catch-up"))


def _run(rig, paths, monkeypatch, *, coalesce: bool):
    class Merger(stream_mod._Merger):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self.coalesce = coalesce

    monkeypatch.setattr(stream_mod, "_Merger", Merger)
    monkeypatch.setattr(stream_mod, "BATCH_FRAMES", 3000)  # several 0.1 s chunks per batch
    steps, ends = [], []

    def tagged(chunks):  # the chunk ends the merger chose
        for chunk in chunks:
            # a chunk holds the frames from the previous end up to its own end
            prev = ends[-1] if ends else -np.inf
            assert ((chunk.teeth.frame_time >= prev) & (chunk.teeth.frame_time < chunk.end_time)
                    ).all()
            ends.append(chunk.end_time)
            yield chunk

    with stream_mod.replay(rig, paths.can, paths.captures, chunk_s=0.1) as chunks:
        drive(pipeline.RunAnalysis(rig), tagged(chunks), lambda out, _: steps.append(out),
              steps.append)
    ev = np.concatenate([s.events for s in steps])
    pipeline._mask(ev, [span for s in steps for span in s.masked_spans])
    return ev, ends


def test_catching_up_in_one_chunk_changes_no_verdict(ride, monkeypatch):
    rig, paths = ride
    ref, ref_ends = _run(rig, paths, monkeypatch, coalesce=False)
    got, got_ends = _run(rig, paths, monkeypatch, coalesce=True)
    # the catch-up really happened: fewer chunks, each ending on a boundary the reference has
    assert len(got_ends) < len(ref_ends) / 2
    assert set(got_ends) <= set(ref_ends)
    assert len(ref) == len(got) > 0
    for name in ref.dtype.names:
        np.testing.assert_array_equal(got[name], ref[name], err_msg=name)
