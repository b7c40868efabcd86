"""The live display shown during a ride (rich): :class:`LiveDisplay` fed :class:`LiveState`."""

from logger.live.display import CAUTION_LINES, CylinderState, LiveDisplay, LiveState, caution_text

__all__ = ["CAUTION_LINES", "CylinderState", "LiveDisplay", "LiveState", "caution_text"]
