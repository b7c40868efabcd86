"""The wording of a run's notes: what the rider reads under the run's summary."""

from __future__ import annotations

from crankbeat.logger.chunks import StreamHealth


def tooth_notes(*, applied: bool, learnt) -> list[str]:
    """Notes on the wheel's tooth errors, most important first.

    ``applied``: some correction applied to the run; ``learnt``: :class:`LearntTeeth`.
    """
    notes = []
    if learnt.keep and not applied:
        notes.append(
            f"tooth spacing errors of {learnt.rms_deg:.3f} deg rms were learnt on this "
            "run's fuel cut and kept for the next runs of this rig; this run is not corrected "
            "(its firing intervals may be off by several degrees): replay it again with --force "
            "to apply them")
    if not applied and not learnt.keep:
        notes.append(
            "the wheel's tooth spacing errors are not known yet (no earlier run of this rig learnt "
            "them, and this run had no usable overrun fuel cut): firing intervals are not "
            "corrected for them and may be off by several degrees")
    return notes


def first_notes(notes: list[str], limit: int = 20) -> list[str]:
    """Notes without repeats, at most ``limit`` (and how many more there were)."""
    seen: list[str] = []
    for n in notes:
        if n not in seen:
            seen.append(n)
    return seen[:limit] + ([f"... and {len(seen) - limit} more"] if len(seen) > limit else [])


def health_dict(h: StreamHealth) -> dict:
    """The stream's counters for the summary (every counter the stream keeps)."""
    as_dict = getattr(h, "as_dict", None)
    if callable(as_dict):
        return as_dict()
    return {
        "can_frames": h.can_frames, "can_lost_frames": h.can_lost_frames,
        "can_unknown_id": h.can_unknown_id, "can_error_frames": h.can_error_frames,
        "can_remote_frames": h.can_remote_frames, "can_bad_length": h.can_bad_length,
        "can_time_backwards": h.can_time_backwards, "can_time_jumps": h.can_time_jumps,
        "serial_good": dict(h.serial_good), "serial_corrupt": dict(h.serial_corrupt),
        "serial_lost": dict(h.serial_lost), "serial_reconnects": dict(h.serial_reconnects),
    }
