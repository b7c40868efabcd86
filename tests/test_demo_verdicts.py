"""The demo ride's verdicts against its simulator truth (fixtures/demo/demo.truth.csv).

The demo holds a burst of misfires on cylinder 2, isolated misfires and a 3 s stretch where
cylinder 1 burns 45 % of its charge. The truth file says, per firing event, whether it fired and
what share burnt; the check values are those counts. A partial burn called a misfire or a dead
spell, or the other cylinder flagged when cylinder 1 recovers, are the faults this guards.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from crankbeat.dsp.events import FIRED, MISFIRE, PARTIAL
from crankbeat.logger.rig import load_rig
from crankbeat.logger.run.drive import analyse_files
from crankbeat.logger.sim import read_truth

DEMO = Path(__file__).resolve().parent.parent / "fixtures" / "demo"


@pytest.fixture(scope="module")
def demo():
    if not (DEMO / "demo.log").is_file():
        pytest.skip("fixtures are missing (make fixtures)")
    out = analyse_files(load_rig("larch"), DEMO / "demo.log",
                        {"bar_left": DEMO / "demo.bar_left.acraw"})
    return out, read_truth(DEMO / "demo.truth.csv")


def _verdicts_at(events, truth, which):
    """The verdict of the event nearest each selected truth event (same cylinder)."""
    out = []
    for t, c in zip(truth["t"][which], truth["cylinder"][which], strict=True):
        same = events["cylinder"] == c
        out.append(events["verdict"][same][np.argmin(np.abs(events["t"][same] - t))])
    return np.asarray(out)


def test_partial_burns_misfires_and_fired_events_of_the_demo(demo):
    out, truth = demo
    ev = out.events
    burnt = truth["burn_fraction"]
    partial = (burnt > 0) & (burnt < 1)
    misfire = ~truth["fired"] & ~truth["fuel_cut"] & ~partial
    fired = truth["fired"] & ~partial
    v_partial = _verdicts_at(ev, truth, partial)
    v_misfire = _verdicts_at(ev, truth, misfire)
    v_fired = _verdicts_at(ev, truth, fired)
    assert partial.sum() == 90 and misfire.sum() == 36  # the scenario (fixtures/README.md)
    # measured: 88 of 90 partial (2 called misfire), 35 of 36 misfires (the other falls in an
    # unusable stretch), 2 fired events called misfire among 2419
    assert (v_partial == PARTIAL).mean() >= 0.95
    assert (v_misfire == MISFIRE).sum() >= 34
    assert np.isin(v_fired, (MISFIRE, PARTIAL)).sum() <= 8
    assert (v_fired == FIRED).sum() > 1800
    assert not any("dead spell" in n for n in out.summary.get("notes", [])), \
        "a partial-burn stretch is no dead spell"
