"""tinyloc: global pose for small outdoor robots from one camera and a 2D vector map.

Conventions (world ENU frame, yaw counter-clockwise from east, map raster layout,
class indices) are fixed in :mod:`tinyloc.frames`, :mod:`tinyloc.geo` and
:mod:`tinyloc.classes`; docs/interfaces.md describes the hand-offs between stages.
"""

from tinyloc import _numba  # noqa: F401  (numba settings must precede any import of numba)

__version__ = "0.1.0"
