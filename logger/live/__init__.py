"""The live display shown during a ride (rich): :class:`LiveDisplay` fed :class:`LiveState`.

The pipeline keeps a :class:`LiveTally` (push each step's events, the stream health, the
vibration level) and, a few times a second, calls ``display.update(tally.state(elapsed_s))``.
"""

from crankbeat.logger.live.display import (
    CAUTION_LINES,
    CylinderState,
    IntervalState,
    LiveDisplay,
    LiveState,
    caution_text,
)
from crankbeat.logger.live.tally import LiveTally

__all__ = ["CAUTION_LINES", "CylinderState", "IntervalState", "LiveDisplay", "LiveState",
           "LiveTally", "caution_text"]
