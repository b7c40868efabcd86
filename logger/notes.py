"""A run's notes ranked by consequence, and its stream health as structured fields.

A run's notes come from many places (readers, decoder, analysis, live faults). Most are details;
a few change how far the run's answers can be trusted: a large share of the data lost, a link
that broke, events judged without the accelerometer, a recording or a store that stopped. Those
*decisive* notes are made here from the counters themselves (not by reading other notes), come
first, and are never cut by the note cap; the others follow in their order, deduplicated, up to
the cap.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence

#: At most this many notes besides the decisive ones are stored with a run.
NOTE_CAP = 20
#: A loss of at least this share of a stream's frames or samples is decisive.
DECISIVE_LOSS = 0.10
#: Small losses of one kind noted at least this many times are folded into one note.
FOLD_FROM = 3

# the small, frequent notes folded into one per stream and kind (their counts are also in the
# stream-health fields): a serial sensor's corrupt or lost frames, a CAN signal's counter gaps
_SERIAL_SMALL = re.compile(r"^(?P<who>[^:\s]+): (?P<n>\d+) (?P<what>corrupt frames|frames lost) at "
                           r"(?P<at>host t=\S+ s)$")
_COUNTER_GAP = re.compile(r"^(?P<who>.+) line (?P<line>\d+): (?P<what>\S+) counter \d+ -> \d+: "
                          r"(?P<n>\d+) frame\(s\) lost$")


def stream_fields(health, watch=None, live: dict | None = None) -> dict:
    """Every stream-health counter, the accelerometer breaks and live faults, for the store."""
    if health is None:
        out: dict = {}
    elif hasattr(health, "as_dict"):
        out = health.as_dict()
    else:  # an older StreamHealth without as_dict
        out = {k: (dict(v) if isinstance(v, dict) else v) for k, v in vars(health).items()
               if k != "notes"}
    if watch is not None:
        out["crank_frames"] = int(watch.crank_frames)
        out["events_without_accel"] = int(watch.events_without_accel)
        out["accel_breaks"] = [b.as_dict() for b in watch.breaks]
    if live:
        out.update(live)
    return out


def _share(lost: int, got: int) -> float:
    total = lost + got
    return lost / total if total > 0 else 0.0


def decisive_notes(fields: dict) -> list[str]:
    """The notes that bound how far the run can be trusted, worst first, from ``fields``."""
    scored: list[tuple[float, str]] = []
    can_lost, can_frames = int(fields.get("can_lost_frames") or 0), int(
        fields.get("can_frames") or 0)
    share = _share(can_lost, can_frames)
    if share >= DECISIVE_LOSS:
        scored.append((share, f"{100 * share:.0f} % of the CAN frames were lost "
                              f"({can_lost} of {can_lost + can_frames}): events in the gaps are "
                              "unusable"))
    good = fields.get("serial_good") or {}
    for name, lost in (fields.get("serial_lost") or {}).items():
        share = _share(int(lost), int(good.get(name, 0)))
        if share >= DECISIVE_LOSS:
            scored.append((share, f"accelerometer {name}: {100 * share:.0f} % of the samples "
                                  f"were lost ({lost} of {int(lost) + int(good.get(name, 0))})"))
    for name, bad in (fields.get("serial_bad_records") or {}).items():
        if bad:
            scored.append((0.4, f"accelerometer {name}: {bad} capture records could not be "
                                "read and were skipped"))
    breaks = fields.get("accel_breaks") or []
    for name in sorted({b["sensor"] for b in breaks}):
        own = [b for b in breaks if b["sensor"] == name]
        secs = sum(b["seconds"] for b in own)
        first = min(b["t_from"] for b in own)
        scored.append((0.6, f"accelerometer {name}: {len(own)} break(s), {secs:.1f} s without "
                            f"samples in all (first at t={first:.1f} s)"))
    for name, n in (fields.get("serial_reconnects") or {}).items():
        if n:
            scored.append((0.55, f"accelerometer {name}: the serial link broke and was "
                                 f"reconnected {n} time(s)"))
    blind = int(fields.get("events_without_accel") or 0)
    if blind:
        scored.append((0.7, f"{blind} events were judged without the accelerometer (no "
                            "rough-road check for them: a misfire there may be a bump)"))
    for text in fields.get("live_faults") or []:
        scored.append((0.9, text))
    scored.sort(key=lambda s: -s[0])
    return [text for _, text in scored]


def fold_small_losses(notes: Iterable[str]) -> list[str]:
    """Notes of the same small loss repeated (a sensor's corrupt or lost frames, a CAN signal's
    counter gaps) folded into one note each, in the place of the first; the rest as they are.

    Twenty one-frame losses would otherwise fill the note cap and push out what matters.
    """
    matched = [(n, _SERIAL_SMALL.match(n) or _COUNTER_GAP.match(n)) for n in notes]
    groups: dict[tuple[str, str], list[re.Match]] = {}
    for _, m in matched:
        if m:
            groups.setdefault((m["who"], m["what"]), []).append(m)
    out: list[str] = []
    done: set[tuple[str, str]] = set()
    for n, m in matched:
        key = (m["who"], m["what"]) if m else None
        if key is None or len(groups[key]) < FOLD_FROM:
            out.append(n)
        elif key not in done:
            done.add(key)
            out.append(_folded(groups[key]))
    return out


def _folded(ms: list[re.Match]) -> str:
    total = sum(int(m["n"]) for m in ms)
    who, what = ms[0]["who"], ms[0]["what"]
    if "line" in ms[0].re.groupindex:
        lines = ", ".join(m["line"] for m in ms[:6]) + (", ..." if len(ms) > 6 else "")
        return (f"{who}: {what} counter gaps at {len(ms)} places (lines {lines}): {total} "
                "frame(s) lost")
    return (f"{who}: {total} {what} in {len(ms)} places from {ms[0]['at']} to {ms[-1]['at']} "
            "(noted places only; the whole run's count is in the stream counters)")


def ranked_notes(decisive: Sequence[str], others: Iterable[str], *,
                 cap: int = NOTE_CAP) -> list[str]:
    """Decisive notes first (never cut), then the others, repeated small losses folded
    (:func:`fold_small_losses`), deduplicated up to ``cap``."""
    seen: list[str] = []
    for n in fold_small_losses(others):
        if n not in seen and n not in decisive:
            seen.append(n)
    kept = seen[:cap]
    if len(seen) > cap:
        kept.append(f"... and {len(seen) - cap} more")
    return list(dict.fromkeys(decisive)) + kept


__all__ = ["NOTE_CAP", "decisive_notes", "fold_small_losses", "ranked_notes", "stream_fields"]
