"""A run's notes ranked by consequence, and its stream health as structured fields.

A run's notes come from many places (readers, decoder, analysis, live faults). Most are details;
a few change how far the run's answers can be trusted: a large share of the data lost, a link
that broke, events judged without the accelerometer, a recording or a store that stopped. Those
*decisive* notes are made here from the counters themselves (not by reading other notes), come
first, and are never cut by the note cap; the others follow in their order, deduplicated, up to
the cap.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

#: At most this many notes besides the decisive ones are stored with a run.
NOTE_CAP = 20
#: A loss of at least this share of a stream's frames or samples is decisive.
DECISIVE_LOSS = 0.10


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


def ranked_notes(decisive: Sequence[str], others: Iterable[str], *,
                 cap: int = NOTE_CAP) -> list[str]:
    """Decisive notes first (never cut), then the others deduplicated up to ``cap``."""
    seen: list[str] = []
    for n in others:
        if n not in seen and n not in decisive:
            seen.append(n)
    kept = seen[:cap]
    if len(seen) > cap:
        kept.append(f"... and {len(seen) - cap} more")
    return list(dict.fromkeys(decisive)) + kept


__all__ = ["NOTE_CAP", "decisive_notes", "ranked_notes", "stream_fields"]
