"""crankbeat: ride-test analysis of crank speed, misfire, firing intervals and rider vibration.

The distribution installs one import name, ``crankbeat``. Its two halves keep the top-level
folders of the source tree: ``crankbeat.dsp`` (the folder ``dsp/``, pure numpy/scipy, no I/O) and
``crankbeat.logger`` (the folder ``logger/``, everything that touches the outside world). The one
exception hierarchy lives in ``crankbeat.errors``.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("crankbeat")
except PackageNotFoundError:  # a source tree that was never installed
    __version__ = "0+unknown"
