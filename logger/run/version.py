"""Which analyser produced a run: the package version plus a revision of the detector.

A re-analysis keeps earlier results under their analyser version. Bump
:data:`DETECTOR_REVISION` with any change that moves a stored number for the same input (a dsp
stage, a threshold, the tooth-correction policy, masking): the package version alone does not
change between commits of one release.
"""

from __future__ import annotations

import crankbeat

#: Revision of the detector and the run layer's policies (see the module docstring).
DETECTOR_REVISION = 1


def analyser_version() -> str:
    """``"<package version>+r<detector revision>"``, e.g. ``"0.1.0+r1"``."""
    return f"{crankbeat.__version__}+r{DETECTOR_REVISION}"
