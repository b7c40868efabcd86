"""A run's notes: decisive ones first and never cut; repeated small losses folded into one."""

from __future__ import annotations

from crankbeat.logger.notes import NOTE_CAP, decisive_notes, fold_small_losses, ranked_notes
from crankbeat.logger.report.text import ride_time

T0 = 1767225600.0


def _serial(kind: str, n: int, t: float) -> str:
    what = "corrupt frames" if kind == "corrupt" else "frames lost"
    return f"bar_left: {n} {what} at host t={T0 + t:.1f} s"


def test_repeated_small_losses_become_one_note_each_with_the_sum():
    notes = ["sync gained at edge 41"]
    notes += [_serial("corrupt", k + 1, 2.0 * k) for k in range(8)]  # 1+2+...+8 = 36 frames
    notes += [_serial("lost", 2, 2.0 * k + 0.3) for k in range(5)]
    notes += [f"/r/ride.log line {100 * k}: crank_teeth counter 1 -> 3: 1 frame(s) lost"
              for k in range(1, 9)]
    out = fold_small_losses(notes)
    assert len(out) == 4 and out[0] == "sync gained at edge 41"
    corrupt, lost, gaps = out[1:]
    assert corrupt.startswith("bar_left: 36 corrupt frames in 8 places")
    assert lost.startswith("bar_left: 10 frames lost in 5 places")
    # the line numbers stay findable (the first six), the total of lost frames is kept
    assert "lines 100, 200, 300, 400, 500, 600, ..." in gaps and gaps.endswith(": 8 frame(s) lost")
    # times stay on the wall clock in the store, and read as time into the ride in the views
    assert ride_time(corrupt, T0).startswith("bar_left: 36 corrupt frames in 8 places from 0.0 s "
                                             "to 14.0 s")


def test_a_loss_seen_twice_or_other_notes_are_kept_as_they_are():
    notes = [_serial("corrupt", 1, 0.0), _serial("corrupt", 1, 5.0), "cylinder 2: events unusable"]
    assert fold_small_losses(notes) == notes


def test_decisive_notes_come_first_and_the_cap_cuts_only_the_rest():
    fields = {"can_lost_frames": 300, "can_frames": 700, "events_without_accel": 12}
    decisive = decisive_notes(fields)
    assert len(decisive) == 2
    assert any(d.startswith("30 % of the CAN frames were lost") for d in decisive)  # 300 of 1000
    others = [f"detail {k}" for k in range(NOTE_CAP + 5)]
    out = ranked_notes(decisive, others)
    assert out[: len(decisive)] == decisive
    assert out[-1] == "... and 5 more" and len(out) == len(decisive) + NOTE_CAP + 1
