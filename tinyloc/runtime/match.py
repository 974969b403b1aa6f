"""The seam between the loop and the perception and correlator stages.

A *perceiver* turns an image and a gravity vector into a bird's-eye grid
(``perceive(image, gravity) -> BevGrid``); a *matcher* correlates a grid with the map
and returns a :class:`~tinyloc.track.gridfilter.LikelihoodVolume`, either over the
whole search window around a centre (``global_search(bev, x, y)``) or in tracking mode
around the estimate (``track(bev, x, y, yaw)``). Both own their buffers and are built
once per calibration and map. The defaults wrap tinyloc's own stages; tests and users
may pass their own objects with the same methods.
"""

from __future__ import annotations

from ..errors import TinylocError


class StageMissing(TinylocError, RuntimeError):
    """A stage the loop needs is not installed in this build."""


def default_perceiver(camera, cfg, geom):
    """tinyloc's classical segmenter + overhead projector for this calibration."""
    try:
        from ._adapters import PerceptionAdapter
    except ImportError as e:  # pragma: no cover - depends on what is installed
        raise StageMissing(f"perception stage unavailable ({e})") from None
    return PerceptionAdapter(camera, cfg, geom)


def default_matcher(packed_map, cfg, geom):
    """tinyloc's FFT rotational correlator over windows of ``packed_map``."""
    try:
        from ._adapters import CorrelatorAdapter
    except ImportError as e:  # pragma: no cover
        raise StageMissing(f"correlator stage unavailable ({e})") from None
    return CorrelatorAdapter(packed_map, cfg, geom)
