"""A CAN clock that steps back: the run keeps one time line (the recording's stamps with the step
taken out), keeps where and by how much it shifted, and maps its times back to the log's stamps.

Check values: the recording itself (the stamps written into it), and the demo ride's log
(fixtures/demo, written by the simulator) damaged by a 2 s step back halfway through its first
25 s, as tests/test_input_faults.py does.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger import pipeline
from crankbeat.logger.can.guard import FrameGuard, log_stamps
from crankbeat.logger.can.sources.base import FrameBatch
from crankbeat.logger.chunks import StreamHealth
from crankbeat.logger.rig import load_rig
from crankbeat.logger.store import Store

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "demo.log"


def _batch(ts: np.ndarray) -> FrameBatch:
    n = len(ts)
    return FrameBatch(ts=ts, can_id=np.full(n, 0x100, np.uint32), extended=np.zeros(n, bool),
                      dlc=np.full(n, 8, np.uint8), data=np.zeros((n, 8), np.uint8),
                      is_error=np.zeros(n, bool), is_remote=np.zeros(n, bool),
                      is_fd=np.zeros(n, bool), index=np.arange(n, dtype=np.int64) + 1,
                      origin="synthetic.log", index_kind="line")


@pytest.mark.parametrize("batch_size", [37, 10_000])
def test_a_step_back_is_shifted_out_recorded_and_mapped_back(batch_size):
    spacing = 1e-3  # a 1 kHz bus
    real = np.arange(3000) * spacing  # when the frames really arrived
    raw = real.copy()
    raw[1000:] -= 0.5  # the logger's clock steps back 0.5 s
    raw[2000:] -= 0.25  # and once more
    health = StreamHealth()
    guard = FrameGuard(health)
    out = [guard.push(_batch(raw[a:a + batch_size])) for a in range(0, len(raw), batch_size)]
    guard.finish()
    ts = np.concatenate([b.ts for b in out])
    assert len(ts) == len(raw) and np.all(np.diff(ts) > 0)  # nothing lost, one time line
    # the run's line is the real arrival line (shift = step + one frame spacing)
    assert ts == pytest.approx(real, abs=1e-9)
    assert health.can_time_steps == 2
    assert [s for _, s in health.can_clock_shifts] == pytest.approx([0.5, 0.25], abs=1e-9)
    assert [f for f, _ in health.can_clock_shifts] == pytest.approx([1.0, 2.0], abs=1e-9)
    # every time maps back to the stamp the recording holds
    assert log_stamps(ts, health.can_clock_shifts) == pytest.approx(raw, abs=1e-9)
    assert any("the run's times after it are the log's stamps plus the shift" in n
               for n in health.notes)


def test_log_stamps_without_shifts_is_the_identity():
    t = np.array([1.0, 2.0, np.nan])
    assert np.array_equal(log_stamps(t, []), t, equal_nan=True)


def _time(line: str) -> float:
    return float(line[line.index("(") + 1 : line.index(")")])


def _stamp(line: str, t: float) -> str:
    a, b = line.index("(") + 1, line.index(")")
    return line[:a] + f"{t:.6f}" + line[b:]


def test_a_replayed_step_back_keeps_the_run_on_one_line_and_says_where(tmp_path):
    lines = []
    with open(DEMO, encoding="ascii") as f:
        for ln in f:
            if lines and _time(ln) - _time(lines[0]) > 25.0:
                break
            lines.append(ln)
    mid = len(lines) // 2
    damaged = lines[:mid] + [_stamp(ln, _time(ln) - 2.0) for ln in lines[mid:]]
    log = tmp_path / "step.log"
    log.write_text("".join(damaged), encoding="ascii")
    with Store.open(tmp_path / "s.db") as store:
        res = pipeline.analyse_replay(load_rig("larch"), log, {}, store)
        ev = store.events(res.run_id)
        summary = store.run(res.run_id)["summary"]
    shifts = summary["stream"]["can_clock_shifts"]
    assert len(shifts) == 1
    start, shift = shifts[0]
    assert shift == pytest.approx(2.0, abs=0.01)  # the step plus one frame spacing
    assert start == pytest.approx(_time(lines[mid]), abs=0.01)  # where the step came
    first, last = _time(damaged[0]), max(_time(ln) for ln in damaged)
    t = ev["t"][np.isfinite(ev["t"])]
    # the run's span is the line with the step taken out: as long as the bike was recorded
    assert summary["t_end"] - summary["t_start"] == pytest.approx(
        _time(lines[-1]) - _time(lines[0]), abs=0.05)
    assert np.all(np.diff(t) > 0)
    # mapped back, every event lies within the recording's own stamps, and those after the
    # step among the stamps after it
    back = log_stamps(t, shifts)
    assert back.min() >= first and back.max() <= last
    after = t >= start
    assert after.sum() > 100
    assert np.all(back[after] >= _time(damaged[mid]) - 0.01)
