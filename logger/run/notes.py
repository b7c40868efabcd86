"""The wording of the run's tooth-error notes (ranking and the stream's notes: logger.notes)."""

from __future__ import annotations


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
            "them, this run had no usable overrun fuel cut, and its riding did not settle them): "
            "firing intervals are not corrected for them and are not judged")
    return notes
